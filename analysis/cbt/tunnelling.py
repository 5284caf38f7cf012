"""Orthodox sequential-tunnelling master equation for a one-dimensional CBT array.

The analytic dip formulas (first order, Pekola et al. 1994; higher order, Farhangfar et al. 1997)
are expansions in u = ΔE/(k_B T). This module solves the problem they approximate without any
expansion: the stationary master equation of orthodox sequential tunnelling (docs/physics.md §1.3;
Melsen, Hanke, Müller & Chao, PRB 55, 10638 (1997) for arrays) over the island-charge
configurations n = (n_1 … n_{N-1}) of a chain of N junctions. It is exact for short chains
(N ≲ 5, limited by the (2K+1)^(N-1) growth of the charge window) and is the reference that the
fast long-array model in :mod:`analysis.cbt.full_model` is built from and checked against.

Everything is in reduced units, so the results plug straight into the team's dip-shape interface:

* x = eV/(N k_B T), the bias per junction in units of k_B T/e (bias applied symmetrically,
  +V/2 on the left lead, −V/2 on the right one);
* u = ΔE/(k_B T) with ΔE = ((N − 1)/N) e²/C, C the junction capacitance (docs/physics.md §1.1), so the
  charging parameter of a junction is c = e²/(C k_B T) = u N/(N − 1);
* conductance as G/G_T with G_T = 1/Σ_k R_k the high-bias conductance of the chain; currents as
  J = I Σ_k R_k e/(N k_B T), which tends to x at high bias.

Conductance G = dI/dV is computed by differentiating the master equation analytically: with the
generator Q(x) and stationary P (Q P = 0, Σ P = 1), the derivative obeys Q P' = −Q'(x) P with
Σ P' = 0, where Q' holds the exact derivatives of the orthodox rates. It is the same sparse matrix
as for P, so one LU factorisation gives both; G = Σ (P' j + P j') is then accurate to rounding
(≈ 1e-13), whereas a finite difference of the current would trade truncation error against
cancellation (at best ~1e-8 with a step of ~1e-4), and a complex step would need complex rates and
a complex factorisation for no gain.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.optimize import brentq

logger = logging.getLogger(__name__)

#: Default half-size of the charge window in standard deviations of the (bias-heated) Gaussian
#: charge distribution. 7 leaves an edge probability below ~1e-7 and a change of G/G_T below
#: ~1e-9 on enlarging the window, at N = 2–5 and u = 0.5–3 (measured, see the tests).
DEFAULT_WINDOW_SIGMAS = 7.0

#: Largest state space we build (memory ~ 0.5 kB per state for the sparse generator and GMRES;
#: the sparse LU is used only for small windows).
MAX_STATES = 3_000_000


class TunnellingModelError(ValueError):
    """The requested array or operating point cannot be solved as asked (a user-fixable input)."""


@dataclass(frozen=True)
class ArrayDescription:
    """A series chain of N tunnel junctions in the reduced description of docs/physics.md §1.3.

    ``resistance_ratios`` are R_k / mean(R) (normalised here to mean 1; default all 1),
    ``c0_ratio`` is the island-to-ground capacitance C_0 over the junction capacitance C, and
    ``offset_charges`` the background charge on each of the N − 1 islands in units of e.
    """

    n_junctions: int
    resistance_ratios: tuple[float, ...] = ()
    c0_ratio: float = 0.0
    offset_charges: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        n = self.n_junctions
        if not isinstance(n, int | np.integer) or n < 2:
            raise TunnellingModelError(
                f"n_junctions must be an integer >= 2 (a chain has at least one island); got {n!r}"
            )
        ratios = tuple(float(r) for r in self.resistance_ratios) or (1.0,) * n
        if len(ratios) != n:
            raise TunnellingModelError(
                f"resistance_ratios must have one entry per junction ({n}); got {len(ratios)}"
            )
        if min(ratios) <= 0 or not all(math.isfinite(r) for r in ratios):
            raise TunnellingModelError("resistance_ratios must be finite and positive")
        mean = sum(ratios) / n
        object.__setattr__(self, "resistance_ratios", tuple(r / mean for r in ratios))
        offsets = tuple(float(q) for q in self.offset_charges) or (0.0,) * (n - 1)
        if len(offsets) != n - 1:
            raise TunnellingModelError(
                f"offset_charges must have one entry per island ({n - 1}); got {len(offsets)}"
            )
        object.__setattr__(self, "offset_charges", offsets)
        if not (self.c0_ratio >= 0 and math.isfinite(self.c0_ratio)):
            raise TunnellingModelError(f"c0_ratio must be finite and >= 0; got {self.c0_ratio!r}")

    @property
    def n_islands(self) -> int:
        return self.n_junctions - 1

    def capacitance_matrix(self) -> np.ndarray:
        """Island capacitance matrix in units of C: C_ii = 2 + C_0/C, C_{i,i±1} = −1."""
        m = self.n_islands
        cmat = np.zeros((m, m))
        idx = np.arange(m)
        cmat[idx, idx] = 2.0 + self.c0_ratio
        cmat[idx[:-1], idx[:-1] + 1] = -1.0
        cmat[idx[1:], idx[1:] - 1] = -1.0
        return cmat

    def inverse_capacitance(self) -> np.ndarray:
        """K̃ = C · (capacitance matrix)^-1, the dimensionless inverse capacitance of the islands."""
        return np.linalg.inv(self.capacitance_matrix())

    def lead_coupling(self) -> np.ndarray:
        """d(reduced island potential)/d(reduced bias v), symmetric bias ±v/2 on the leads."""
        m = self.n_islands
        drive = np.zeros(m)
        # Island 1 couples to the left lead (+v/2) and island N−1 to the right lead (−v/2)
        # through one junction capacitance each: φ = K (q + C_c V_lead), docs/physics.md §1.3.
        drive[0] += 0.5
        drive[-1] -= 0.5
        return self.inverse_capacitance() @ drive

    def junction_charging(self) -> np.ndarray:
        """(1/2)(K̃_aa + K̃_bb − 2 K̃_ab) for each junction (units of e²/C), leads contributing 0.

        docs/physics.md §1.3: for a uniform chain with C_0 = 0 every entry is (N − 1)/(2N).
        """
        k = self.inverse_capacitance()
        m = self.n_islands
        full = np.zeros((m + 2, m + 2))
        full[1:-1, 1:-1] = k
        a = np.arange(self.n_junctions)
        return 0.5 * (full[a, a] + full[a + 1, a + 1] - 2.0 * full[a, a + 1])


def charging_parameter(u: float, n_junctions: int) -> float:
    """c = e²/(C k_B T) from u = ΔE/(k_B T), ΔE = ((N − 1)/N) e²/C (Pekola et al. 1994)."""
    return float(u) * n_junctions / (n_junctions - 1)


def orthodox_rate_factor(y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """φ(y) = y/(e^y − 1) and its derivative φ'(y), y = ΔF/(k_B T).

    Orthodox theory: Γ = (k_B T/(e² R)) φ(ΔF/k_B T) for a tunnelling event that changes the free
    energy by ΔF (docs/physics.md §1.3; Melsen et al., PRB 55, 10638 (1997)). Near y = 0 both are taken
    from their Bernoulli series (φ = Σ B_n yⁿ/n!) to avoid cancellation; elsewhere from expm1, in a
    form that neither overflows for large positive y nor loses precision for large negative y.
    """
    y = np.asarray(y, dtype=float)
    phi = np.empty_like(y)
    dphi = np.empty_like(y)
    small = np.abs(y) < 0.05
    ys = y[small]
    y2 = ys * ys
    # Bernoulli numbers B2 = 1/6, B4 = −1/30, B6 = 1/42, B8 = −1/30: truncation < 1e-19 here.
    phi[small] = 1.0 - ys / 2.0 + y2 / 12.0 - y2 * y2 / 720.0 + y2**3 / 30240.0
    dphi[small] = -0.5 + ys / 6.0 - ys * y2 / 180.0 + ys * y2 * y2 / 5040.0 - ys * y2**3 / 151200.0
    yl = y[~small]
    with np.errstate(over="ignore"):
        em1 = np.expm1(yl)
        phi[~small] = yl / em1
        # φ' = [1 − y e^y/(e^y − 1)]/(e^y − 1), with e^y/(e^y − 1) = −1/expm1(−y).
        dphi[~small] = (1.0 + yl / np.expm1(-yl)) / em1
    return phi, dphi


@dataclass(frozen=True)
class ChargeWindow:
    """The island-charge configurations kept in the master equation.

    ``centre`` is the configuration the window is centred on (the mean charge, rounded),
    ``half_widths`` its extent per island, and states are further restricted to the ellipsoid
    where the Gaussian estimate of their probability exceeds exp(−sigmas²/2).
    """

    centre: tuple[int, ...]
    half_widths: tuple[int, ...]
    sigmas: float
    noise_temperature: float


@dataclass(frozen=True)
class MasterEquationSolution:
    """Stationary solution at one operating point (reduced units, see module docstring).

    ``conductance`` is G/G_T; ``current`` J (→ x at high bias); ``boundary_probability`` the
    stationary probability on states at the edge of the charge window (a truncation indicator);
    ``window_change`` the |ΔG/G_T| when the window was enlarged (None if not checked);
    ``solver`` the linear solve used ("LU" for small windows, "GMRES" above
    DIRECT_SOLVE_MAX_STATES states, or the higher limit for one to three islands).
    """

    x: float
    u: float
    conductance: float
    current: float
    n_states: int
    mean_charge: tuple[float, ...]
    boundary_probability: float
    window: ChargeWindow
    window_change: float | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)
    solver: str = ""
    _window_solution: object = field(default=None, repr=False, compare=False)

    @property
    def converged(self) -> bool:
        """True when both truncation indicators are small: edge probability < 1e-6 and (if
        checked) |ΔG/G_T| < 1e-8 on enlarging the window. Measured: the change in G/G_T is
        typically 100x smaller than the edge probability."""
        ok = self.boundary_probability < 1e-6
        if self.window_change is not None:
            ok = ok and self.window_change < 1e-8
        return ok


def _choose_window(
    array: ArrayDescription, c: float, x: float, sigmas: float, centre: np.ndarray | None
) -> ChargeWindow:
    n = array.n_junctions
    cmat = array.capacitance_matrix()
    # Shot noise of the junctions feeding an island heats its charge distribution to about
    # (x/2) coth(x/2) k_B T (measured: the stationary covariance keeps the equilibrium shape
    # (T/c) C̃ with this T to within 10 %, slightly below it at large u).
    half_bias = 0.5 * abs(x)
    temperature = half_bias / math.tanh(half_bias) if half_bias > 1e-8 else 1.0
    if centre is None:
        # With C_0 > 0 a uniform current needs a linear potential profile, which the islands can
        # only hold with charge C_0 φ_i on them (many electrons at high bias); offsets shift the
        # minimum-energy configuration by the offset charge itself.
        v = n * x
        profile = v * (0.5 - np.arange(1, n) / n)
        centre = -(array.c0_ratio * profile / c) + np.asarray(array.offset_charges)
    centre = np.rint(centre).astype(int)
    # Gaussian estimate of the charge distribution: P ∝ exp(−c/(2T) q·K̃q), covariance (T/c)·C̃.
    sd = np.sqrt(temperature * np.diag(cmat) / c)
    half = np.ceil(sigmas * sd).astype(int) + 1
    return ChargeWindow(tuple(int(a) for a in centre), tuple(int(h) for h in half), sigmas,
                        temperature)


def _ellipsoid_count_estimate(form: np.ndarray, radius_sq: float) -> float:
    """Volume of {q : q·A q ≤ r²}, which approximates its number of lattice points."""
    m = form.shape[0]
    unit_ball = math.pi ** (m / 2) / math.gamma(m / 2 + 1)
    return unit_ball * radius_sq ** (m / 2) / math.sqrt(float(np.linalg.det(form)))


def estimated_window_states(array: ArrayDescription, x: float, u: float, sigmas: float) -> float:
    """About how many charge states the window of :func:`solve_master_equation` holds here."""
    c = charging_parameter(u, array.n_junctions)
    window = _choose_window(array, c, x, sigmas, np.zeros(array.n_islands))
    form = (c / window.noise_temperature) * array.inverse_capacitance()
    return _ellipsoid_count_estimate(form, sigmas**2)


def _enumerate_states(array: ArrayDescription, c: float, window: ChargeWindow) -> np.ndarray:
    """Integer charge configurations inside the window's energy ellipsoid.

    The window is {q : (c / 2T) q·K̃q ≤ sigmas²/2} around ``window.centre`` (an energy bound of
    sigmas²/2 k_B T_eff in the charging energy, docs/physics.md §1.3). It is enumerated directly,
    one island at a time from the last, with the remaining budget of the quadratic form after
    the coordinates already fixed (the lattice enumeration of Fincke & Pohst, Math. Comp. 44,
    463 (1985)), so the cost is proportional to the states kept, not to a bounding box.
    """
    m = array.n_islands
    form = (c / window.noise_temperature) * array.inverse_capacitance()
    radius_sq = window.sigmas**2
    estimate = _ellipsoid_count_estimate(form, radius_sq)
    if estimate > 1.5 * MAX_STATES:
        raise TunnellingModelError(
            f"about {estimate:.3g} charge states needed for N = {array.n_junctions} at "
            f"c = e²/(C k_B T) = {c:.3g}, charge-noise temperature "
            f"{window.noise_temperature:.3g} k_B T: beyond the exact solver's limit "
            f"({MAX_STATES}); use a shorter array or the long-array model "
            "(analysis.cbt.full_model)"
        )
    # q·A q = Σ_i (R_ii q_i + Σ_{j>i} R_ij q_j)² with A = RᵀR (R upper triangular): fixing
    # q_m, q_{m−1}, … in turn leaves a one-dimensional interval for the next coordinate.
    upper = np.linalg.cholesky(form).T
    partial = np.zeros((1, m), dtype=np.int32)
    budget = np.array([radius_sq])
    for i in range(m - 1, -1, -1):
        shift = partial[:, i + 1 :] @ upper[i, i + 1 :] if i < m - 1 else np.zeros(len(partial))
        centre_i = -shift / upper[i, i]
        half = np.sqrt(np.maximum(budget, 0.0)) / upper[i, i]
        lo = np.ceil(centre_i - half - 1e-12).astype(np.int64)
        hi = np.floor(centre_i + half + 1e-12).astype(np.int64)
        count = np.maximum(hi - lo + 1, 0)
        total = int(count.sum())
        if total > 2 * MAX_STATES:
            raise TunnellingModelError(
                f"more than {2 * MAX_STATES} charge states needed for N = {array.n_junctions} at "
                f"c = e²/(C k_B T) = {c:.3g}: beyond the exact solver's limit; use the "
                "long-array model (analysis.cbt.full_model)"
            )
        parent = np.repeat(np.arange(len(partial)), count)
        first = np.repeat(np.cumsum(count) - count, count)
        value = lo[parent] + (np.arange(total) - first)
        partial = partial[parent]
        partial[:, i] = value
        residual = upper[i, i] * value + shift[parent]
        budget = budget[parent] - residual**2
    states = partial + np.asarray(window.centre, dtype=np.int32)
    if len(states) > MAX_STATES:
        raise TunnellingModelError(
            f"{len(states)} charge states needed for N = {array.n_junctions} at "
            f"c = e²/(C k_B T) = {c:.3g}, charge-noise temperature "
            f"{window.noise_temperature:.3g} k_B T: beyond the exact "
            "solver's limit; use the long-array model (analysis.cbt.full_model)"
        )
    return states


def _state_keys(states: np.ndarray, low: np.ndarray, size: np.ndarray) -> np.ndarray:
    """One int64 key per charge configuration inside the box [low, low + size) (row-major)."""
    rel = states.astype(np.int64) - low
    keys = np.zeros(len(states), dtype=np.int64)
    for i in range(states.shape[1]):
        keys = keys * int(size[i]) + rel[:, i]
    return keys


class _StateIndex:
    """Index of a sorted set of charge configurations, for neighbour and warm-start look-ups."""

    def __init__(self, states: np.ndarray) -> None:
        self.low = states.min(axis=0).astype(np.int64) - 1
        self.size = states.max(axis=0).astype(np.int64) - self.low + 2
        if float(np.prod(self.size.astype(float))) >= 2.0**62:
            raise TunnellingModelError("charge window too wide to index")
        keys = _state_keys(states, self.low, self.size)
        self.order = np.argsort(keys)
        self.sorted_keys = keys[self.order]

    def find(self, states: np.ndarray) -> np.ndarray:
        """Index of each configuration in the set, −1 where it is not in it."""
        rel = states.astype(np.int64) - self.low
        inside = np.all((rel >= 0) & (rel < self.size), axis=1)
        out = np.full(len(states), -1, dtype=np.int64)
        if not inside.any():
            return out
        keys = _state_keys(states[inside], self.low, self.size)
        pos = np.minimum(np.searchsorted(self.sorted_keys, keys), len(self.sorted_keys) - 1)
        hit = self.sorted_keys[pos] == keys
        found = np.where(hit, self.order[pos], -1)
        out[inside] = found
        return out


#: Below this many states the sparse LU is the fastest solve; above it Jacobi-preconditioned
#: GMRES (measured: LU fill-in of the 5-dimensional N = 6 lattice costs 25 s for 9 229 states at
#: u = 3, GMRES 0.05 s to a relative residual of 2e-14).
DIRECT_SOLVE_MAX_STATES = 3000

#: ... except on low-dimensional lattices, where the LU's fill-in stays small: one or two
#: islands (N = 2, 3) are always factorised, and three islands (N = 4) up to 60 000 states
#: (measured, N = 4, C_0/C = 0.2: 5–7 s by LU for 26 000–34 000 states against 48–52 s by GMRES
#: on the loaded machine; N = 3 at x = 40: 0.1 s by LU for 15 000 states, where restarted GMRES
#: with the Jacobi preconditioner stalls for minutes far out in bias with C_0 > 0).
DIRECT_SOLVE_MAX_STATES_BY_ISLANDS = {1: MAX_STATES, 2: MAX_STATES, 3: 60_000}


def _direct_solve_limit(n_islands: int) -> int:
    return max(DIRECT_SOLVE_MAX_STATES, DIRECT_SOLVE_MAX_STATES_BY_ISLANDS.get(n_islands, 0))

#: Relative residual to which the iterative solve is driven (then checked independently).
ITERATIVE_RTOL = 1e-13


@dataclass(frozen=True)
class _WindowSolution:
    conductance: float
    current: float
    mean_charge: np.ndarray
    edge_probability: float
    states: np.ndarray
    probability: np.ndarray
    probability_derivative: np.ndarray
    method: str


def _linear_solve(
    matrix: sp.csc_matrix, rhs: np.ndarray, guess: np.ndarray | None, lu: object | None
) -> tuple[np.ndarray, str]:
    if lu is not None:
        return lu.solve(rhs), "LU"
    diagonal = matrix.diagonal()
    jacobi = spla.LinearOperator(matrix.shape, lambda v: v / diagonal)
    scale = float(np.linalg.norm(rhs))
    if scale == 0.0:
        return np.zeros_like(rhs), "GMRES"
    sol, info = spla.gmres(matrix, rhs, x0=guess, M=jacobi, rtol=ITERATIVE_RTOL, atol=0.0,
                           restart=60, maxiter=400)
    residual = float(np.linalg.norm(matrix @ sol - rhs)) / scale
    if info != 0 or not residual < 1e3 * ITERATIVE_RTOL:
        logger.warning("GMRES stopped at relative residual %.1e (info %d); solving by sparse LU",
                       residual, info)
        return _factorise(matrix).solve(rhs), "LU after GMRES"
    return sol, "GMRES"


def _factorise(matrix: sp.csc_matrix):  # noqa: ANN202 (SuperLU object)
    # No pivoting: with the pinned row the matrix is column diagonally dominant (each diagonal
    # entry is minus the sum of its column's rates), for which LU without pivoting is stable;
    # dropping the pivot search lets SuperLU keep the symmetric fill-reducing ordering of this
    # structurally symmetric matrix, which is ~20x faster than partial pivoting at N = 4.
    return spla.splu(matrix, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                     options={"SymmetricMode": True})


def _solve_on_window(
    array: ArrayDescription,
    c: float,
    x: float,
    states: np.ndarray,
    window: ChargeWindow,
    warm_start: _WindowSolution | None = None,
) -> _WindowSolution:
    """Stationary P and dP/dx on one charge window, and from them J and G/G_T.

    Solves Q P = 0 and Q P' = −(dQ/dx) P (the analytic derivative of the orthodox master
    equation, docs/physics.md §1.3; Melsen et al., PRB 55, 10638 (1997)) with one balance
    equation replaced by a pinned weight, then averages the junction currents J = Σ_k Γ_net,k P
    and conductances dJ/dx over the junctions (they agree when the solve is sound)."""
    m = array.n_islands
    n_states = len(states)
    index = _StateIndex(states)
    gen = _generator(array, c, x, states, index)
    pivot = int(index.find(np.asarray(window.centre, dtype=np.int64)[None, :])[0])
    if pivot < 0:
        pivot = 0
    matrix, dgen = _pinned_system(gen, pivot, n_states)
    lu = _factorise(matrix) if n_states <= _direct_solve_limit(m) else None
    guess_p = guess_dp = None
    if warm_start is not None and lu is None:
        guess_p, guess_dp = _warm_guess(warm_start, states, pivot)

    rhs = np.zeros(n_states)
    rhs[pivot] = 1.0
    prob, method = _linear_solve(matrix, rhs, guess_p, lu)
    prob /= prob.sum()
    rhs_d = -(dgen @ prob)
    rhs_d[pivot] = 0.0
    dprob, method_d = _linear_solve(matrix, rhs_d, guess_dp, lu)
    dprob -= dprob.sum() * prob

    currents = gen.junction_current @ prob
    conductances = gen.junction_current @ dprob + gen.junction_current_derivative @ prob
    spread = float(np.max(np.abs(conductances - conductances.mean())))
    if spread > 1e-8:
        logger.warning("junction conductances disagree by %.3g (ill-conditioned solve)", spread)
    return _WindowSolution(
        conductance=float(conductances.mean()),
        current=float(currents.mean()),
        mean_charge=prob @ states,
        edge_probability=float(prob[gen.boundary].sum()),
        states=states,
        probability=prob,
        probability_derivative=dprob,
        method=method if method == method_d else f"{method}/{method_d}",
    )


@dataclass(frozen=True)
class _Generator:
    """The master equation's generator Q and its bias derivative dQ/dx on a window, as
    coordinate lists (``rows``, ``cols``, ``rate``, ``rate_derivative``; the diagonal last),
    with the net forward rate through each junction per state (``junction_current``, N × states)
    and its derivative, and which states have a transition leaving the window (``boundary``)."""

    rows: np.ndarray
    cols: np.ndarray
    rate: np.ndarray
    rate_derivative: np.ndarray
    junction_current: np.ndarray
    junction_current_derivative: np.ndarray
    boundary: np.ndarray


def _node_potentials(array: ArrayDescription, c: float, x: float, states: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Reduced node potentials ψ = eφ/k_B T of every state (leads at ±v/2, v = N x; islands
    c (q_0 − n) K̃ + v × lead coupling, docs/physics.md §1.3) and their derivative in x."""
    n = array.n_junctions
    v = n * x
    coupling = array.lead_coupling()
    charges = np.asarray(array.offset_charges) - states  # island charge in units of e
    psi = np.empty((len(states), n + 1))
    psi[:, 0] = 0.5 * v
    psi[:, n] = -0.5 * v
    psi[:, 1:n] = c * charges @ array.inverse_capacitance() + v * coupling
    dpsi_dx = np.concatenate(([0.5], coupling, [-0.5])) * n
    return psi, dpsi_dx


def _generator(array: ArrayDescription, c: float, x: float, states: np.ndarray,
               index: _StateIndex) -> _Generator:
    """Orthodox rates Γ = φ(ΔF)/R_k of every one-electron transition inside the window and their
    derivatives in x (docs/physics.md §1.3; Melsen et al., PRB 55, 10638 (1997))."""
    n = array.n_junctions
    m = array.n_islands
    n_states = len(states)
    psi, dpsi_dx = _node_potentials(array, c, x, states)
    e_junction = c * array.junction_charging()
    inv_r = 1.0 / np.asarray(array.resistance_ratios)

    rows, cols, data, ddata = [], [], [], []
    out_rate = np.zeros(n_states)
    out_drate = np.zeros(n_states)
    src = np.arange(n_states)
    jnet = np.zeros((n, n_states))  # net forward rate through each junction, per state
    djnet = np.zeros((n, n_states))
    boundary = np.zeros(n_states, dtype=bool)
    for k in range(1, n + 1):
        # "Forward" = one electron from node k to node k−1 (conventional current left to right
        # for positive bias). ΔF = ψ_k − ψ_{k−1} + e²(K_aa + K_bb − 2K_ab)/2, docs/physics.md §1.3.
        delta = np.zeros(m, dtype=np.int32)
        if k <= m:
            delta[k - 1] -= 1
        if k >= 2:
            delta[k - 2] += 1
        drive = psi[:, k] - psi[:, k - 1]
        ddrive = dpsi_dx[k] - dpsi_dx[k - 1]
        for sign in (1, -1):
            target = index.find(states + sign * delta)
            valid = target >= 0
            boundary |= ~valid
            y = sign * drive[valid] + e_junction[k - 1]
            phi, dphi = orthodox_rate_factor(y)
            rate = phi * inv_r[k - 1]
            drate = dphi * sign * ddrive * inv_r[k - 1]
            s = src[valid]
            rows.append(target[valid])
            cols.append(s)
            data.append(rate)
            ddata.append(drate)
            out_rate[s] += rate
            out_drate[s] += drate
            jnet[k - 1, s] += sign * rate
            djnet[k - 1, s] += sign * drate
    rows.append(src)
    cols.append(src)
    data.append(-out_rate)
    ddata.append(-out_drate)
    return _Generator(np.concatenate(rows), np.concatenate(cols), np.concatenate(data),
                      np.concatenate(ddata), jnet, djnet, boundary)


def _pinned_system(gen: _Generator, pivot: int, n_states: int
                   ) -> tuple[sp.csc_matrix, sp.csr_matrix]:
    """Q with the pivot's balance equation replaced by P_pivot = 1, and dQ/dx.

    The balance equations are linearly dependent (columns of a generator sum to zero), so one
    of them, the centre state's, is replaced by fixing that state's weight. Fixing one entry
    keeps the matrix as sparse as Q; a row of ones (Σ P = 1) would be dense and ruin the LU
    fill-in. Normalising afterwards gives P; for P' any solution of Q y = −Q'P is P' up to a
    multiple of P, and Σ P' = 0 fixes that multiple."""
    keep = gen.rows != pivot
    a_rows = np.concatenate((gen.rows[keep], [pivot]))
    a_cols = np.concatenate((gen.cols[keep], [pivot]))
    a_data = np.concatenate((gen.rate[keep], [1.0]))
    matrix = sp.csc_matrix((a_data, (a_rows, a_cols)), shape=(n_states, n_states))
    dgen = sp.csr_matrix((gen.rate_derivative, (gen.rows, gen.cols)), shape=(n_states, n_states))
    return matrix, dgen


def _warm_guess(warm_start: _WindowSolution, states: np.ndarray, pivot: int
                ) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Starting vectors for the iterative solve along a bias sweep: the previous point's P and
    P', carried over state by state and scaled to the pinned normalisation P_pivot = 1 (None
    when the pivot state carried no weight)."""
    n_states = len(states)
    where = _StateIndex(warm_start.states).find(states)
    carried = where >= 0
    old_p = np.zeros(n_states)
    old_dp = np.zeros(n_states)
    old_p[carried] = warm_start.probability[where[carried]]
    old_dp[carried] = warm_start.probability_derivative[where[carried]]
    if not old_p[pivot] > 0:
        return None, None
    # The pinned systems' solutions are P/P_pivot and P' − (P'_pivot/P_pivot) P.
    return old_p / old_p[pivot], old_dp - (old_dp[pivot] / old_p[pivot]) * old_p


def solve_master_equation(
    array: ArrayDescription,
    x: float,
    u: float,
    *,
    sigmas: float = DEFAULT_WINDOW_SIGMAS,
    check_window: bool = False,
    warm_start: MasterEquationSolution | None = None,
) -> MasterEquationSolution:
    """Stationary orthodox master equation of a 1D array at reduced bias x and u = ΔE/(k_B T).

    Orthodox sequential tunnelling, docs/physics.md §1.3 (rates Γ = ΔF/(e²R[exp(ΔF/k_BT) − 1]),
    free-energy change ΔF = e(φ_a − φ_b) + (e²/2)(K_aa + K_bb − 2K_ab)); Melsen et al., PRB 55,
    10638 (1997) for arrays. Returns G/G_T (by the analytic derivative of the stationary
    solution, see module docstring) and the current.

    The charge window is bounded by energy: the configurations q (relative to its centre) with
    charging energy (e²/2) q·K q ≤ (sigmas²/2) k_B T_eff, an ellipsoid in the inverse-capacitance
    metric (so the Gaussian estimate of their probability exceeds exp(−sigmas²/2)). T_eff, the
    charge-noise temperature (x/2) coth(x/2), grows the window with bias. It is centred on the
    expected charge (the linear-profile charge C_0 φ_i plus offsets), then recentred on the
    computed mean charge if that lies more than half an electron away. Its truncation is
    reported as the stationary probability on the window edge; with ``check_window`` the
    solution is repeated on a window 1.5 σ larger and the change in G/G_T reported as
    ``window_change``. ``warm_start`` (the previous point of a bias sweep, as returned by this
    function) is the starting guess of the iterative solve.
    """
    if not (math.isfinite(x) and math.isfinite(u)) or u <= 0:
        raise TunnellingModelError(f"need finite x and u > 0; got x = {x!r}, u = {u!r}")
    c = charging_parameter(u, array.n_junctions)
    notes: list[str] = []
    window = _choose_window(array, c, x, sigmas, None)
    previous = None if warm_start is None else warm_start._window_solution
    for _ in range(4):
        states = _enumerate_states(array, c, window)
        solved = _solve_on_window(array, c, x, states, window, previous)
        shift = np.abs(solved.mean_charge - np.asarray(window.centre))
        if np.all(shift <= 0.5):
            break
        notes.append(f"window recentred from {window.centre} to mean charge {solved.mean_charge}")
        window = _choose_window(array, c, x, sigmas, solved.mean_charge)
        previous = solved
    change = None
    if check_window:
        wider = _choose_window(array, c, x, sigmas + 1.5, np.asarray(window.centre))
        wide = _solve_on_window(array, c, x, _enumerate_states(array, c, wider), wider, solved)
        change = abs(wide.conductance - solved.conductance)
    return MasterEquationSolution(
        x=float(x),
        u=float(u),
        conductance=solved.conductance,
        current=solved.current,
        n_states=len(states),
        mean_charge=tuple(float(q) for q in solved.mean_charge),
        boundary_probability=solved.edge_probability,
        window=window,
        window_change=change,
        notes=tuple(notes),
        solver=solved.method,
        _window_solution=solved,
    )


def solve_bias_sweep(
    array: ArrayDescription,
    xs: np.ndarray,
    u: float,
    *,
    sigmas: float = DEFAULT_WINDOW_SIGMAS,
    check_window: bool = False,
) -> list[MasterEquationSolution]:
    """The master equation at each bias of ``xs`` in turn, each solve warm-started from the last.

    Same physics and window rule as :func:`solve_master_equation` (docs/physics.md §1.3); order the
    biases so that neighbours are close (e.g. increasing) for the warm start to help. Every
    solution carries its own window-convergence indicators.
    """
    out: list[MasterEquationSolution] = []
    for xv in np.asarray(xs, dtype=float).ravel():
        out.append(solve_master_equation(array, float(xv), u, sigmas=sigmas,
                                         check_window=check_window,
                                         warm_start=out[-1] if out else None))
    return out


def conductance(
    x: np.ndarray | float, u: float, array: ArrayDescription, *, sigmas: float = DEFAULT_WINDOW_SIGMAS
) -> np.ndarray:
    """G/G_T of the array at each reduced bias in ``x`` (exact master equation, docs/physics.md §1.3)."""
    xs = np.atleast_1d(np.asarray(x, dtype=float))
    out = np.array([solve_master_equation(array, float(xi), u, sigmas=sigmas).conductance
                    for xi in xs.ravel()])
    return out.reshape(xs.shape) if np.ndim(x) else out.reshape(())


def dip_depth(u: float, array: ArrayDescription, *, sigmas: float = DEFAULT_WINDOW_SIGMAS) -> float:
    """ΔG/G_T = 1 − G(0)/G_T from the exact master equation (docs/physics.md §1.3)."""
    return 1.0 - solve_master_equation(array, 0.0, u, sigmas=sigmas).conductance


def full_width_half_depth(
    u: float, array: ArrayDescription, *, sigmas: float = DEFAULT_WINDOW_SIGMAS, xtol: float = 1e-9
) -> float:
    """FWHM of the dip in units of N k_B T/e (twice the x where G/G_T = 1 − depth/2).

    The half-depth point is bracketed between 0.5 and 3 times the first-order root x = 2.71958
    (Pekola et al. 1994, docs/physics.md §1.1) and found by Brent's method on the exact conductance.
    Assumes a dip symmetric in bias (no offset charges or asymmetric resistances that break the
    x → −x symmetry); otherwise measures the positive-bias half only and doubles it.
    """
    depth = dip_depth(u, array, sigmas=sigmas)
    level = 1.0 - 0.5 * depth

    def excess(xv: float) -> float:
        return solve_master_equation(array, xv, u, sigmas=sigmas).conductance - level

    root = brentq(excess, 0.5 * 2.7195849526, 3.0 * 2.7195849526, xtol=xtol, rtol=1e-12)
    return 2.0 * root
