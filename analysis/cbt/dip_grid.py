"""A cheap representation of a tabulated CBT dip for the inner loop of a fit.

A fit evaluates the dip shape S(x, u) = 1 − u D(x, u) thousands of times (every walker of every
MCMC step, at every bias point and lock-in quadrature node), while the reference evaluation of a
tabulated model (a bivariate quintic B-spline of exact master-equation tables with their
continuations, :mod:`analysis.cbt.full_model`) costs about a microsecond per point.
:class:`GridDip` samples any such reference reduced dip D(x, u) once, on a uniform (x, u) grid, and
replaces it by the tensor-product quintic interpolating spline of the samples (de Boor, *A
Practical Guide to Splines*, rev. ed., Springer 2001, ch. XVII: the tensor product of univariate
interpolating splines interpolates the grid), stored as one bivariate polynomial per grid cell in
the cell's own coordinates. Where the reference is itself a quintic spline whose knots lie on the
grid (today's tables: x knots every 0.2, 0.5 and 1, u knots every 0.1), the two agree to rounding.

Two evaluation paths give the same function:

* **One u per curve** (the fit's pattern: u of shape (walkers, 1, 1) against biases of shape
  (walkers, points, nodes)). For each u the polynomial in u of every cell is summed once (one
  small matrix product), leaving a piecewise quintic in x per walker; each bias point then costs
  one look-up and a Horner step.
* **Any (x, u) pairs** (e.g. the self-heating model, where u varies along the sweep): the full
  bivariate polynomial of the point's cell.

Beyond the sampled range |x| ≤ ``x_end`` the reference's own exponential continuation is applied.

The representation's own error, max |u (D_grid − D_ref)| over the centres of the grid cells (where
interpolation errors peak), is measured at build time and exposed as
:attr:`GridDip.measured_error`, so a change of the reference (other tables, another continuation, a
larger u range) needs no change here: the error is measured again and enters the model error.

The samples are mirrored to x < 0 before the x spline is fitted (D is even), so the grid has no
slope at x = 0; unmirrored, it had one (up to 1e-3 of G_T per unit x at N = 6, u = 5), a kink of
|x| that a few-node lock-in quadrature cannot integrate.

The lock-in average (analysis.cbt.models.forward_conductance) stays a quadrature outside the grid.
It is a semicircle average over a window of half-width α = e a/(N k_B T) in x, and α changes with
every temperature the sampler proposes. Folding it into each walker's polynomial by the moment
expansion p + (α²/8) p″ + (α⁴/192) p⁗ (exact for a quintic) was tried and measured: against a
dense adaptive average of the (then unmirrored) table spline it erred by up to 5e-7 in G/G_T at
|x| < α, and the spline's rough fifth derivative (steps up to ~0.4 per cell) limits it to
α < 0.06, so the Gauss–Chebyshev quadrature was kept. That roughness limits the quadrature too
(the spline is only C⁴): its error is measured at the fitted α and u and carried in the budget
(analysis.cbt.models.lockin_quadrature_error).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from scipy.interpolate import make_interp_spline

#: Grid steps in x = eV/(N k_B T) and u = ΔE/(k_B T), and the spline degree. A quintic on this
#: grid reproduces today's table spline to ~1e-15 in G/G_T (measured at build,
#: GridDip.measured_error); a cubic on a four times finer x grid still differed by 5e-9
#: (measured while choosing) and needs more cells per walker.
X_STEP = 0.1
U_STEP = 0.1
DEGREE = 5

#: Grid cells mirrored to x < 0 (2.0 in x at X_STEP, as many as the table spline mirrors,
#: analysis.cbt.full_model.MIRRORED_NODES): with fewer, the spline of an even dip keeps a slope
#: at x = 0 (measured with none: |∂G/∂x|(0+) up to 1e-3 of G_T at N = 6, u = 5).
MIRRORED_CELLS = 20


class GridDip:
    """Tensor-product interpolating spline of a reference reduced dip D(x, u) on a uniform grid.

    ``reference(x, u)`` must accept broadcasting arrays with x ≥ 0 and return D; it is called once
    here, on the grid and on the cell centres. ``u_range`` is the interval of u the grid covers
    (best somewhat beyond the validated range, so that no range end falls inside it), ``x_end`` the
    |x| up to which D is sampled, and ``tail_decay`` the rate κ of the reference's own continuation
    D(x_end, u) exp(−κ (|x| − x_end)) beyond it, which is applied unchanged.
    """

    def __init__(
        self,
        reference: Callable[[np.ndarray, np.ndarray], np.ndarray],
        u_range: tuple[float, float],
        x_end: float,
        tail_decay: float,
        x_step: float = X_STEP,
        u_step: float = U_STEP,
    ) -> None:
        u_lo, u_hi = map(float, u_range)
        nx = int(round(x_end / x_step))
        nu = int(round((u_hi - u_lo) / u_step))
        self.x_step = float(x_end) / nx
        self.u_step = (u_hi - u_lo) / nu
        self.x_end = float(x_end)
        self.u_lo, self.u_hi = u_lo, u_hi
        self.tail_decay = float(tail_decay)
        self.degree = DEGREE
        x_nodes = np.linspace(0.0, self.x_end, nx + 1)
        u_nodes = np.linspace(u_lo, u_hi, nu + 1)
        # D is even in x: the samples are mirrored to x < 0 (MIRRORED_CELLS) before the x spline
        # is fitted, so that the spline is even at x = 0 up to the faint echo of its far end
        # conditions instead of carrying a slope there (a kink of |x| that a lock-in quadrature
        # cannot integrate; module docstring).
        m = min(MIRRORED_CELLS, nx)
        # (the very node values of x_nodes, so that every cell's Taylor expansion below is taken
        # exactly at a knot, from the right)
        x_all = np.concatenate((-x_nodes[m:0:-1], x_nodes))
        values = np.asarray(reference(np.abs(x_all)[:, None], u_nodes[None, :]), dtype=float)
        # Interpolate in x for every u node and re-expand the spline about the left end of every
        # uniform cell (Taylor coefficients f^(k)(x_i+)/k!), then do the same in u for every one of
        # those coefficients: both steps are linear, so the result is the tensor-product spline.
        k = self.degree
        spline_x = make_interp_spline(x_all, values, k=k, axis=0)
        taylor_x = np.stack([spline_x(x_nodes[:-1], nu=j) / math.factorial(j)
                             for j in range(k, -1, -1)])  # (power of x desc., x cell, u node)
        spline_u = make_interp_spline(u_nodes, taylor_x, k=k, axis=2)
        taylor_xu = np.stack([spline_u(u_nodes[:-1], nu=j) / math.factorial(j)
                              for j in range(k, -1, -1)])  # (power of u, power of x, x cell, u cell)
        # Coefficients in the cell's own coordinates t = (x − x_i)/h_x, s = (u − u_j)/h_u ∈ [0, 1).
        p = np.arange(k, -1, -1)
        taylor_xu = taylor_xu * (self.u_step ** p)[:, None, None, None]
        taylor_xu = taylor_xu * (self.x_step ** p)[None, :, None, None]
        #: (u cell, power of x, power of u, x cell); powers descending as in scipy PPoly.
        self._cells = np.ascontiguousarray(np.transpose(taylor_xu, (3, 1, 0, 2)))
        self._nx, self._nu = nx, nu
        self._u_powers = np.arange(k, -1, -1)
        # Own error at the cell centres in both x and u, weighted by u as in G/G_T = 1 − u D.
        xm = x_nodes[:-1] + 0.5 * self.x_step
        um = u_nodes[:-1] + 0.5 * self.u_step
        ref_mid = np.asarray(reference(xm[:, None], um[None, :]), dtype=float)
        mine = self.reduced(xm[:, None], um[None, :])
        #: max |ΔG/G_T| of this representation against its reference, at the cell centres.
        self.measured_error = float(np.max(np.abs(um[None, :] * (mine - ref_mid))))

    # ----------------------------------------------------------------------------------------

    def _u_cell(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        s = (u - self.u_lo) * (1.0 / self.u_step)
        iu = np.minimum(np.maximum(s.astype(np.intp), 0), self._nu - 1)
        return iu, s - iu

    def _tail(self, ax: np.ndarray, reduced: np.ndarray) -> np.ndarray:
        beyond = ax > self.x_end
        if beyond.any():
            reduced = np.where(beyond, reduced * np.exp(-self.tail_decay * (ax - self.x_end)), reduced)
        return reduced

    def reduced(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        """D(x, u) at broadcasting x and u (u inside ``u_range``; not checked here)."""
        x = np.asarray(x, dtype=float)
        u = np.asarray(u, dtype=float)
        shape = np.broadcast_shapes(x.shape, u.shape)
        if u.size * 8 <= math.prod(shape):
            return self._look_up(np.abs(x), u, shape)
        return self._per_point(np.abs(x), u, shape)

    def _curves(self, u: np.ndarray, cells: int) -> np.ndarray:
        """Sum the u polynomial of the first ``cells`` x cells for every value of u.

        Returns the piecewise polynomials in x as rows (power of x, value of u × x cell).
        """
        k = self.degree
        iu, su = self._u_cell(u)
        powers = su[:, None] ** self._u_powers  # (u value, power of u), descending
        first = int(iu[0])
        if (iu == first).all():  # the walkers of one sweep usually share one u cell
            rows = np.matmul(powers, self._cells[first][:, :, :cells])
        else:
            rows = np.empty((k + 1, u.size, cells))
            for cell in np.unique(iu):
                at = iu == cell
                rows[:, at] = np.matmul(powers[at], self._cells[cell][:, :, :cells])
        return rows.reshape(k + 1, -1)

    def _look_up(self, ax: np.ndarray, u: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
        """Curve m (one per value of u) evaluated at the |x| that broadcast against position m of u."""
        top = float(np.max(ax, initial=0.0))
        if math.isnan(top):  # a NaN bias or temperature gives NaN, never a number from the grid
            return np.where(np.isnan(ax), np.nan, self._look_up(np.nan_to_num(ax), u, shape))
        far = top >= self.x_end
        # Only the x cells up to the largest |x| are summed (one spare against rounding).
        cells = self._nx if far else min(self._nx, int(top * (1.0 / self.x_step)) + 2)
        rows = self._curves(u.ravel(), cells)
        s = np.minimum(ax, self.x_end) if far else ax
        s = s * (1.0 / self.x_step)
        cell = s.astype(np.intp)  # floor, s >= 0
        if far:
            np.minimum(cell, self._nx - 1, out=cell)
        t = np.broadcast_to(s - cell, shape).ravel()
        # Each curve's cells follow the previous curve's: an integer offset per value of u.
        flat = (cell + np.arange(0, u.size * cells, cells).reshape(u.shape)).ravel()
        out = rows[0].take(flat)
        for q in range(1, self.degree + 1):
            out *= t
            out += rows[q].take(flat)
        out = out.reshape(shape)
        return self._tail(np.broadcast_to(ax, shape), out) if far else out

    def _per_point(self, ax: np.ndarray, u: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
        """Any (x, u) pairs: the full bivariate polynomial of each point's cell."""
        k, nx = self.degree, self._nx
        ax = np.broadcast_to(ax, shape).ravel()
        if np.isnan(ax).any():  # NaN in gives NaN out, never a number from the grid
            clean = self._per_point(np.nan_to_num(ax), np.broadcast_to(u, shape).ravel(), ax.shape)
            return np.where(np.isnan(ax), np.nan, clean).reshape(shape)
        iu, su = self._u_cell(np.broadcast_to(u, shape).ravel())
        sx = np.minimum(ax, self.x_end) * (1.0 / self.x_step)
        ix = np.minimum(sx.astype(np.intp), nx - 1)
        t = sx - ix
        base = iu * ((k + 1) * (k + 1) * nx) + ix
        flat_cells = self._cells.ravel()
        out = np.zeros(ax.shape)
        for p in range(k + 1):
            row = np.zeros(ax.shape)
            for q in range(k + 1):
                row *= t
                row += flat_cells.take(base + (q * (k + 1) + p) * nx)
            out *= su
            out += row
        return self._tail(ax, out).reshape(shape)
