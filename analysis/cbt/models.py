"""Conductance dip of a Coulomb-blockade thermometer (CBT) in weak blockade.

A CBT is a chain of N metallic tunnel junctions (possibly M such chains in parallel). Charging
effects suppress the conductance near zero bias; the suppression's *width* is set by k_B T alone
(V_1/2 = 5.439 N k_B T/e), which makes the device a primary thermometer, and its *depth* by the
ratio u = ΔE/(k_B T) of the charging energy to the thermal energy.

Every dip model here is a *dip shape*: a callable ``shape(x, u) -> G/G_T`` of the reduced bias per
junction x = eV/(N k_B T) and of u, broadcasting the two against each other. Fits take any shape,
so models of different fidelity (first order, higher order, full tunnelling) can be swapped. The
:func:`forward_conductance` function adds what the instrument does on top of the device: bias
offset, lock-in excitation averaging and a linear background.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE

#: FWHM of the first-order dip in units of N k_B T / e: twice the root x of g(x) = g(0)/2 = 1/12.
#: Pekola et al., PRL 73, 2903 (1994); the 10-digit value is derived (docs/physics.md 1.1) and checked
#: in tests by root finding.
HALF_WIDTH_FACTOR = 5.439169905

#: Junction non-uniformity narrows the dip: FWHM × (1 − 0.7343 σ_R²), σ_R the relative spread of
#: the junction resistances (first order; docs/physics.md 1.4, derived, checked there by an exact master
#: equation at N = 2: −0.738; error ∝ variance: Pekola et al., arXiv:2112.13830 (2021)).
NON_UNIFORMITY_WIDTH_COEFFICIENT = 0.7343

#: Width correction coefficient: V_1/2 = 5.439 N k_B T/e (1 + 0.3921 ΔG/G_T),
#: Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997).
WIDTH_CORRECTION = 0.3921

# Taylor coefficients of g(x) about x = 0 (derived from the Bernoulli-number series of
# x coth(x/2) and 2(cosh x - 1); docs/physics.md 1.1 lists the first three).
_G_SERIES = (
    1.0 / 6.0,
    -1.0 / 60.0,
    1.0 / 1008.0,
    -1.0 / 21600.0,
    1.0 / 532224.0,
    -691.0 / 9906624000.0,
    1.0 / 410572800.0,
)
_SERIES_LIMIT = 0.3  # |x| below which the series (truncation < 1e-17) beats the closed form


class DipShape(Protocol):
    """A model of the normalised conductance G/G_T of one chain.

    ``x`` is the reduced bias eV/(N k_B T), ``u`` = ΔE/(k_B T); both broadcast. ``name`` identifies
    the model in records; ``max_u`` is the largest u at which the model is validated for
    certificates; ``relative_width_error(u)`` bounds the error of the temperature it implies.
    """

    name: str
    max_u: float

    def __call__(self, x: np.ndarray, u: np.ndarray) -> np.ndarray: ...

    def relative_width_error(self, u: float) -> float: ...


def dip_function(x: np.ndarray) -> np.ndarray:
    """g(x) = [x sinh x − 4 sinh²(x/2)] / [8 sinh⁴(x/2)] = [x coth(x/2) − 2] / [4 sinh²(x/2)].

    Pekola, Hirvi, Kauppinen & Paalanen, PRL 73, 2903 (1994), the first-order dip function
    (their eq. for G/G_T = 1 − (ΔE/k_BT) g(eV/Nk_BT)). g is even; near x = 0 we use its Taylor series
    (1/6 − x²/60 + x⁴/1008 − …) to avoid cancellation; for large |x| the form in e^{−|x|} below
    neither overflows nor loses precision, so g decays smoothly to 0.
    """
    x = np.abs(np.asarray(x, dtype=float))
    out = np.empty_like(x)
    small = x < _SERIES_LIMIT
    xs = x[small]
    x2 = xs * xs
    acc = np.full_like(xs, _G_SERIES[-1])
    for c in _G_SERIES[-2::-1]:
        acc = acc * x2 + c
    out[small] = acc
    xl = x[~small]
    q = np.exp(-xl)
    one_minus_q = -np.expm1(-xl)
    # x coth(x/2) - 2 = [x (1 + q) - 2 (1 - q)] / (1 - q);  4 sinh^2(x/2) = (1 - q)^2 / q
    out[~small] = (xl * (1.0 + q) - 2.0 * one_minus_q) * q / one_minus_q**3
    return out


def depth_series(u: np.ndarray | float) -> np.ndarray:
    """Dip depth ΔG/G_T = u/6 − u²/60 + u³/630.

    Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997) (the third-order series in u; its first
    term is Pekola et al. 1994).
    """
    u = np.asarray(u, dtype=float)
    return u / 6.0 - u**2 / 60.0 + u**3 / 630.0


def invert_depth_series(depth: np.ndarray | float) -> np.ndarray:
    """u such that u/6 − u²/60 + u³/630 = depth (Farhangfar et al. 1997), by Newton iteration.

    Used for secondary thermometry (docs/physics.md 1.5). The series is monotonic for u below ~5.
    """
    d = np.asarray(depth, dtype=float)
    if np.any(d <= 0) or np.any(d >= depth_series(4.0)):
        raise ValueError("depth must lie in (0, 0.55); the series is not valid beyond u = 4")
    u = 6.0 * d
    for _ in range(60):
        f = depth_series(u) - d
        df = 1.0 / 6.0 - u / 30.0 + u**2 / 210.0
        step = f / df
        u = u - step
        if np.all(np.abs(step) <= 1e-15 * np.abs(u)):
            break
    return u


@dataclass(frozen=True)
class FirstOrderShape:
    """G/G_T = 1 − u g(x): Pekola et al., PRL 73, 2903 (1994), first order in u.

    Its temperature is exact only as u → 0: fitted to exact data it reads T high by ~1.8 % at
    u = 0.2 and ~4.5 % at u = 0.5 (docs/physics.md 1.2, derived); our own measurement against the full
    model gives ≈ 0.105 u over the whole range (analysis.cbt.choice), bounded here by 0.11 u.
    """

    name: str = "weak-blockade first order (Pekola 1994)"
    max_u: float = 0.01

    def __call__(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        return 1.0 - np.asarray(u, dtype=float) * dip_function(x)

    def relative_width_error(self, u: float) -> float:
        # Measured bias of full-line fits against the full tunnelling model (analysis.cbt.choice).
        return 0.11 * float(u)


@dataclass(frozen=True)
class HigherOrderShape:
    """Weak-blockade dip with the higher-order corrections of Farhangfar et al. (1997).

    Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997) give the depth to third order,
    ΔG/G_T = u/6 − u²/60 + u³/630, and the width V_1/2 = 5.439 N k_B T/e (1 + 0.3921 ΔG/G_T).
    We carry both into the first-order line shape of Pekola et al. (1994):
    G/G_T = 1 − 6 d(u) g(x / s), d(u) the depth series and s = 1 + 0.3921 d(u), so that the
    model's depth and FWHM are exactly the published ones. Against exact master-equation
    solutions the width *formula* is low by only 0.03 % at u = 0.2 and 0.16 % at u = 0.5
    (docs/physics.md 1.2, derived), but the line shape away from the half-depth points is not the exact
    one at O(u²), and a fit of the whole sweep reads T high by ≈ 0.042 u (measured against the
    full tunnelling model, analysis.cbt.choice). :meth:`relative_width_error` bounds this by
    0.045 u; the full model is preferred wherever it is validated.
    """

    name: str = "weak-blockade higher order (Farhangfar 1997)"
    max_u: float = 1.0

    def __call__(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        d = depth_series(u)
        s = 1.0 + WIDTH_CORRECTION * d
        return 1.0 - 6.0 * d * dip_function(np.asarray(x, dtype=float) / s)

    def relative_width_error(self, u: float) -> float:
        # Measured full-line fit bias against the full model: 3.9e-4 at u = 0.01, 0.80 % at 0.2,
        # 2.0 % at 0.48, 4.4 % at 1 (analysis.cbt.choice), bounded by 0.045 u.
        return 0.045 * float(u)


first_order_shape = FirstOrderShape()
higher_order_shape = HigherOrderShape()


# --------------------------------------------------------------------------------------------
# Instrument effects


@functools.lru_cache(maxsize=32)
def chebyshev_u_nodes(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss–Chebyshev nodes t_i and weights w_i of the second kind, normalised for the lock-in.

    Σ w_i f(t_i) = (2/π) ∫_{-1}^{1} f(t) √(1 − t²) dt, exact for polynomials of degree ≤ 2n − 1
    (Abramowitz & Stegun 25.4.40). The weights sum to 1. Cached (every likelihood call asks for
    them); the arrays are read-only.
    """
    i = np.arange(1, n + 1)
    theta = i * np.pi / (n + 1)
    nodes, weights = np.cos(theta), (2.0 / (n + 1)) * np.sin(theta) ** 2
    nodes.flags.writeable = False
    weights.flags.writeable = False
    return nodes, weights


def lockin_nodes_for(alpha_max: float) -> int:
    """Number of Gauss–Chebyshev nodes for the lock-in average at α = e a/(N k_B T) ≤ ``alpha_max``.

    For the smooth weak-blockade shapes (first and higher order) the average is accurate to
    < 1e-9 of G_T over α ≤ 4 (tests/test_cbt_models, against scipy.integrate.quad). Not for
    every shape: the full model's table spline is only C⁴ (quintic, knots every 0.2–1 in x) and
    sharp at large u, and its few-node average was measured against a dense one up to 8e-9 (N = 2,
    α = 0.3, 3 nodes), 5e-6 (N = 6, u = 5, α = 0.3, 3 nodes) and 1e-5 (N = 6, u = 5, α = 2.5,
    14 nodes). That error is not bounded here but measured for the fitted α and u by
    :func:`lockin_quadrature_error` and carried in the model row of the budget.
    """
    if alpha_max <= 0:
        return 0
    if alpha_max < 0.3:
        return 3
    if alpha_max < 1.0:
        return 8
    if alpha_max < 2.5:
        return 14
    return 24


def relative_width_from_conductance_error(shape: DipShape, u: float, conductance_error: float) -> float:
    """Relative error of the FWHM (so of T) that an error ε of G/G_T anywhere in the dip implies.

    ε shifts the half-depth point by ε/|∂G/∂x|; the slope there is taken from the shape itself
    (central difference at the half-depth point of a sampling every 0.01 in x, x ≤ 12).
    """
    u = float(u)
    if u <= 0:
        return 0.0
    xs = np.linspace(0.0, 12.0, 1201)
    g = shape(xs, u)
    depth = 1.0 - g[0]
    i = int(np.argmax(g >= 1.0 - 0.5 * depth))
    slope = (g[i + 1] - g[i - 1]) / (xs[i + 1] - xs[i - 1])
    return float(conductance_error) / (abs(slope) * xs[i])


#: Reference of :func:`lockin_quadrature_error`: Gauss–Legendre points per piece, equal pieces in θ.
_REFERENCE_POINTS = 96
_REFERENCE_PIECES = 12


def lockin_quadrature_error(
    shape: DipShape, alpha: float, u: float, nodes: int | None = None, x_span: float = 20.0
) -> float:
    """Measured max |ΔG/G_T| of the ``nodes``-node lock-in average of ``shape`` at this α and u.

    The quadrature the fit uses (:func:`averaged_shape`, :func:`lockin_nodes_for` nodes unless
    given) against an independent dense one of the same semicircle average (2/π) ∫₀^π S(x +
    α cos θ) sin²θ dθ (docs/physics.md 1.4): composite Gauss–Legendre in θ (Abramowitz & Stegun
    25.4.29) on equal pieces, with a piece boundary where the argument crosses x = 0 (where a
    tabulated dip may be least smooth), over x = 0 … α + ``x_span`` (the dip is even, its tail
    beyond flat). Costs about one fit step; for the budget, not for the likelihood.
    """
    alpha = float(alpha)
    if alpha <= 0:
        return 0.0
    if nodes is None:
        nodes = lockin_nodes_for(alpha)
    x = np.unique(np.concatenate([np.linspace(0.0, 2.0 * alpha, 65),
                                  np.linspace(0.0, alpha + x_span, 401)]))
    t, w = chebyshev_u_nodes(nodes)
    fast = shape(x[:, None] + alpha * t, u) @ w
    # Piece boundaries in θ (one row per x): equal pieces plus the crossing of x + α cos θ = 0.
    crossing = np.where(x < alpha, np.arccos(-np.minimum(x, alpha) / alpha), np.pi)
    cuts = np.sort(np.concatenate([np.broadcast_to(np.linspace(0.0, np.pi, _REFERENCE_PIECES + 1),
                                                   (x.size, _REFERENCE_PIECES + 1)),
                                   crossing[:, None]], axis=1), axis=1)
    gl_t, gl_w = np.polynomial.legendre.leggauss(_REFERENCE_POINTS)
    lo, hi = cuts[:, :-1, None], cuts[:, 1:, None]  # (x, piece, 1)
    theta = 0.5 * (lo + hi) + 0.5 * (hi - lo) * gl_t
    values = shape(x[:, None, None] + alpha * np.cos(theta), u) * np.sin(theta) ** 2
    dense = (2.0 / np.pi) * np.sum(0.5 * (hi - lo)[..., 0] * (values @ gl_w), axis=1)
    return float(np.max(np.abs(fast - dense)))


def lockin_average(
    conductance: Callable[[np.ndarray], np.ndarray],
    bias: np.ndarray,
    amplitude_peak: float,
    nodes: int | None = None,
) -> np.ndarray:
    """Conductance read by a lock-in with sinusoidal excitation of peak amplitude a.

    The first-harmonic response is G_meas(V₀) = (2/π) ∫₀^π G(V₀ + a cos θ) sin²θ dθ
    (docs/physics.md 1.4; to lowest order G + (a²/8) G''). We evaluate the integral exactly for the
    model by Gauss–Chebyshev quadrature of the second kind, not only its a²/8 term.
    ``conductance`` maps bias (any shape) to G; the nodes are added on a new last axis.
    """
    bias = np.asarray(bias, dtype=float)
    if amplitude_peak <= 0:
        return conductance(bias)
    if nodes is None:
        nodes = 24
    t, w = chebyshev_u_nodes(nodes)
    g = conductance(bias[..., None] + amplitude_peak * t)
    return g @ w


@dataclass(frozen=True)
class HeatingModel:
    """Electron–phonon heat balance of the islands (self-heating by the bias).

    Each island receives the Joule power of its junction, about (V/N)²/R_T, plus a heat leak P₀,
    and cools through electron–phonon coupling P = Σ Ω (T_e⁵ − T_p⁵) (Wellstood, Urbina & Clarke,
    PRB 49, 5942 (1994)); hence T_e(V) = [T_p⁵ + (P₀ + V²/(N² R_T))/(Σ Ω)]^(1/5), with the
    conductance evaluated at T_e(V) (the usual CBT fitting model; docs/physics.md 1.4). T_p⁵ and P₀/ΣΩ
    enter only as a sum, so P₀ cannot be fitted from one sweep: it is a stated input.
    ``coupling_W_per_K5`` is Σ Ω; ``junction_resistance_ohm`` is R_T of one junction.
    """

    coupling_W_per_K5: float
    junction_resistance_ohm: float
    heat_leak_W: float = 0.0

    def electron_temperature(self, bias: np.ndarray, phonon_temperature: np.ndarray, n_junctions: int) -> np.ndarray:
        """T_e at each bias (V, already offset-corrected); broadcasts against the temperature."""
        power = self.heat_leak_W + np.asarray(bias) ** 2 / (n_junctions**2 * self.junction_resistance_ohm)
        return (np.asarray(phonon_temperature) ** 5 + power / self.coupling_W_per_K5) ** 0.2


@dataclass(frozen=True)
class SweepSetup:
    """What the experiment fixes: junction count, lock-in excitation and (optionally) heating."""

    junctions_in_series: int
    excitation_rms_V: float = 0.0
    heating: HeatingModel | None = None

    @property
    def excitation_peak_V(self) -> float:
        return math.sqrt(2.0) * self.excitation_rms_V


def forward_conductance(
    shape: DipShape,
    bias: np.ndarray,
    setup: SweepSetup,
    temperature: np.ndarray,
    charging_energy: np.ndarray,
    asymptotic_conductance: np.ndarray,
    bias_offset: np.ndarray,
    background_slope: np.ndarray | float = 0.0,
    lockin_nodes: int | None = None,
) -> np.ndarray:
    """Measured conductance for a batch of parameter vectors (vectorised over both).

    G(V) = G_T [1 + β (V − V₀)] · shape(e(V − V₀)/(N k_B T), ΔE/(k_B T)), averaged over the
    lock-in excitation (docs/physics.md 1.4). ``temperature`` (K), ``charging_energy`` ΔE/k_B (K),
    ``asymptotic_conductance`` G_T (S), ``bias_offset`` V₀ (V) and ``background_slope`` β (1/V)
    are arrays of a common batch shape B (or scalars); ``bias`` has shape (n,). Returns B + (n,).
    Series resistance is removed from the data before the fit (see :func:`correct_series_resistance`).
    With ``setup.heating`` the temperature is the phonon (bath) temperature and the shape is
    evaluated at the electron temperature of every bias point (:class:`HeatingModel`).
    """
    bias = np.asarray(bias, dtype=float)
    T = np.asarray(temperature, dtype=float)
    gt = np.asarray(asymptotic_conductance, dtype=float)[..., None]
    v0 = np.asarray(bias_offset, dtype=float)[..., None]
    beta = np.asarray(background_slope, dtype=float)[..., None]
    centred = bias - v0
    u = np.asarray(charging_energy, dtype=float) / T
    return gt * (1.0 + beta * centred) * averaged_shape(shape, centred, setup, T, u, lockin_nodes)


def averaged_shape(
    shape: DipShape,
    centred: np.ndarray,
    setup: SweepSetup,
    temperature: np.ndarray,
    u: np.ndarray,
    lockin_nodes: int | None = None,
) -> np.ndarray:
    """The dip shape G/G_T as the instrument reads it, at offset-corrected biases V − V₀ (V).

    ``centred`` has shape B + (n,), ``temperature`` (K) and ``u`` = ΔE/(k_B T) shape B. The
    lock-in average of docs/physics.md 1.4 by Gauss–Chebyshev quadrature (:func:`lockin_nodes_for`
    nodes) and, with ``setup.heating``, the electron temperature of every bias point; the part of
    :func:`forward_conductance` a fit evaluates for every walker (the amplitudes are linear).
    """
    T = np.asarray(temperature, dtype=float)[..., None]
    u = np.asarray(u, dtype=float)[..., None]
    scale = ELEMENTARY_CHARGE / (setup.junctions_in_series * BOLTZMANN * T)
    a = setup.excitation_peak_V
    if setup.heating is not None:
        return _heated_shape(shape, centred, setup, T, u * T, a, lockin_nodes)
    if a > 0:
        alpha_max = a * float(np.max(scale))
        n_nodes = lockin_nodes if lockin_nodes is not None else lockin_nodes_for(alpha_max)
        t, w = chebyshev_u_nodes(n_nodes)
        # Nodes on a new first axis, so that each node's biases stay contiguous for the shape.
        x0 = centred * scale
        offsets = (a * t).reshape((-1,) + (1,) * max(np.ndim(centred), scale.ndim)) * scale
        s = shape(x0 + offsets, u)
        return (w @ s.reshape(n_nodes, -1)).reshape(s.shape[1:])
    return shape(centred * scale, u)


def _heated_shape(shape, centred, setup, T, ec, a, lockin_nodes):
    """Shape at the bias-dependent electron temperature, lock-in averaged node by node."""
    N = setup.junctions_in_series
    if a > 0:
        alpha_max = float(np.max(ELEMENTARY_CHARGE * a / (N * BOLTZMANN * T)))
        t, w = chebyshev_u_nodes(lockin_nodes if lockin_nodes is not None else lockin_nodes_for(alpha_max))
        v = centred[..., None] + a * t
        te = setup.heating.electron_temperature(v, T[..., None], N)
        x = ELEMENTARY_CHARGE * v / (N * BOLTZMANN * te)
        return shape(x, ec[..., None] / te) @ w
    te = setup.heating.electron_temperature(centred, T, N)
    return shape(ELEMENTARY_CHARGE * centred / (N * BOLTZMANN * te), ec / te)


def correct_series_resistance(
    bias: np.ndarray, conductance: np.ndarray, series_resistance: float
) -> tuple[np.ndarray, np.ndarray]:
    """Remove a two-wire series (lead) resistance R_s from a measured sweep.

    Circuit theory (docs/physics.md 1.4): the array sees V − I R_s and G = G_m / (1 − R_s G_m). The
    current is the running integral of G_m dV (trapezoid rule), zero at the bias point closest to
    zero; the error of that integral constant is second order in R_s G_T × depth.
    """
    bias = np.asarray(bias, dtype=float)
    gm = np.asarray(conductance, dtype=float)
    if series_resistance == 0:
        return bias.copy(), gm.copy()
    if np.any(series_resistance * gm >= 1):
        raise ValueError("series resistance times conductance reaches 1: the correction diverges")
    order = np.argsort(bias)
    vb, gb = bias[order], gm[order]
    current = np.concatenate([[0.0], np.cumsum(0.5 * (gb[1:] + gb[:-1]) * np.diff(vb))])
    current -= np.interp(0.0, vb, current)
    v_array = np.empty_like(bias)
    v_array[order] = vb - current * series_resistance
    return v_array, gm / (1.0 - series_resistance * gm)


def half_width_voltage(
    temperature: float,
    junctions_in_series: int,
    shape: DipShape = first_order_shape,
    charging_energy: float = 0.0,
) -> float:
    """Full width at half depth of the dip, V_1/2 (V).

    For the first-order model 5.439 N k_B T/e (Pekola et al. 1994); for the higher-order model
    multiplied by (1 + 0.3921 ΔG/G_T) (Farhangfar et al. 1997).
    """
    v = HALF_WIDTH_FACTOR * junctions_in_series * BOLTZMANN * temperature / ELEMENTARY_CHARGE
    if isinstance(shape, HigherOrderShape) and charging_energy > 0:
        v *= 1.0 + WIDTH_CORRECTION * float(depth_series(charging_energy / temperature))
    return v


def numerical_fwhm(x: np.ndarray, normalised_conductance: np.ndarray) -> tuple[float, float]:
    """Depth 1 − G(0)/G_T and FWHM of a symmetric dip sampled on x ≥ 0 (x[0] = 0), G_T = 1.

    Linear interpolation of the half-depth crossing on a fine grid; for checks and planning.
    """
    g = np.asarray(normalised_conductance, dtype=float)
    depth = 1.0 - g[0]
    half = 1.0 - depth / 2.0
    i = int(np.argmax(g >= half))
    x0, x1, g0, g1 = x[i - 1], x[i], g[i - 1], g[i]
    return depth, 2.0 * (x0 + (half - g0) * (x1 - x0) / (g1 - g0))
