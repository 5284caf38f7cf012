"""The cheap evaluation grid of tabulated dips (analysis.cbt.dip_grid) against its references."""

import pickle

import numpy as np
import pytest

from analysis.cbt.dip_grid import MIRRORED_CELLS, X_STEP, GridDip
from analysis.cbt.full_model import X_TABLE_END, FullTunnellingShape
from analysis.cbt.models import WIDTH_CORRECTION, depth_series, dip_function


def series_reduced(x, u):
    """(1 − G/G_T)/u of the higher-order weak-blockade shape: 6 d(u) g(x/s)/u.

    Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997) (depth series d(u) and width factor s)
    on the first-order dip g of Pekola et al., PRL 73, 2903 (1994): a smooth closed form whose knots
    are nowhere near the grid, so the grid has to interpolate, not merely reproduce.
    """
    x, u = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(u, dtype=float))
    d = depth_series(u)
    s = 1.0 + WIDTH_CORRECTION * d
    ratio = np.where(u > 0, 6.0 * d / np.where(u > 0, u, 1.0), 1.0)  # 6 d(u)/u → 1 as u → 0
    return ratio * dip_function(x / s)


@pytest.fixture(scope="module")
def series_grid():
    return GridDip(series_reduced, (0.0, 3.2), 40.0, tail_decay=1.0)


def test_grid_interpolates_a_smooth_closed_form(series_grid):
    # The weak-blockade series (Pekola 1994, Farhangfar 1997) sampled every 0.1 in x and u and
    # interpolated by the tensor-product quintic: off-grid points agree to well below the
    # tables' own interpolation error (1e-8) and within twice the error the grid measured itself.
    rng = np.random.default_rng(11)
    x = rng.uniform(0.0, 39.0, 20_000)
    u = rng.uniform(0.0, 3.0, 20_000)
    error = np.max(np.abs(u * (series_grid.reduced(x, u) - series_reduced(x, u))))
    assert series_grid.measured_error < 1e-9
    assert error <= 2 * series_grid.measured_error + 1e-14


def test_one_u_per_curve_and_per_point_paths_agree(series_grid):
    rng = np.random.default_rng(12)
    x = np.linspace(-45.0, 45.0, 901)  # both signs, and beyond the sampled end
    u = rng.uniform(0.0, 3.0, (5, 1))
    per_curve = series_grid.reduced(x, u)  # one u per row: the fit's call pattern
    per_point = series_grid.reduced(np.broadcast_to(x, (5, 901)), np.broadcast_to(u, (5, 901)))
    assert per_curve.shape == per_point.shape == (5, 901)
    assert np.max(np.abs(per_curve - per_point)) < 1e-14
    assert np.array_equal(per_curve, series_grid.reduced(-x, u))  # even in x


def test_beyond_the_sampled_end_the_given_decay_continues_the_grid(series_grid):
    u = 2.0
    edge = series_grid.reduced(np.array([40.0]), u)[0]
    far = series_grid.reduced(np.array([42.5, 50.0]), u)
    assert far == pytest.approx(edge * np.exp(-1.0 * np.array([2.5, 10.0])), rel=1e-12)


def test_nan_in_gives_nan_out(series_grid):
    x = np.array([0.0, np.nan, 3.0])
    one_u = series_grid.reduced(x[None, :].repeat(20, 0), np.ones((20, 1)))
    assert np.isnan(one_u[:, 1]).all() and np.isfinite(one_u[:, [0, 2]]).all()
    pairs = series_grid.reduced(x, np.array([1.0, 1.0, 2.0]))
    assert np.isnan(pairs[1]) and np.isfinite(pairs[[0, 2]]).all()


@pytest.mark.parametrize("n", [2, 4, 33])
def test_full_model_grid_matches_todays_table_spline(n):
    # The fast evaluation is a re-expression of the table spline, not a new approximation: against
    # the spline evaluated directly it agrees to rounding, inside and beyond the tables, except
    # within the mirrored span |x| < 2 where both splines are made even from mirrored nodes and
    # differ by the faint echo of their different far ends: there within the error the grid
    # measured itself at build (~1e-11, carried by model_error).
    shape = FullTunnellingShape(n)
    rng = np.random.default_rng(n)
    x = rng.uniform(-1.2 * X_TABLE_END, 1.2 * X_TABLE_END, 50_000)
    u = rng.uniform(0.0, min(3.0, shape.max_u), 50_000)
    error = np.abs(shape(x, u) - shape.reference(x, u))
    mirrored = np.abs(x) < MIRRORED_CELLS * X_STEP
    assert np.max(error[~mirrored]) < 1e-13
    assert 0.0 < np.max(error[mirrored]) <= 2 * shape._grid.measured_error < 1e-9
    xs = np.linspace(-30.0, 30.0, 601)
    us = rng.uniform(0.0, min(3.0, shape.max_u), (12, 1, 1))
    walkers = xs[None, :, None] + np.array([-0.1, 0.0, 0.1])  # lock-in nodes on the last axis
    error = np.abs(shape(walkers, us) - shape.reference(walkers, us))
    assert np.max(error) <= 2 * shape._grid.measured_error
    assert np.max(error[:, np.abs(xs) > 2.2]) < 1e-13
    assert shape.model_error(1.0) >= shape._grid.measured_error


def test_full_model_travels_between_processes_by_its_defining_numbers():
    # Parallel sweep fits send shapes between processes: by (N, C_0/C), rebuilt from a cache.
    shape = FullTunnellingShape(33)
    copy = pickle.loads(pickle.dumps(shape))
    assert len(pickle.dumps(shape)) < 1000
    assert copy == shape and copy.name == shape.name
    x = np.linspace(-20.0, 20.0, 81)
    assert np.array_equal(copy(x, 1.3), shape(x, 1.3))
