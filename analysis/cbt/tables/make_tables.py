"""Generate the exact short-array conductance tables behind analysis.cbt.full_model.

Run from the repository root, one command per file (times on one core of the shared machine):

    .venv/bin/python -m analysis.cbt.tables.make_tables              # short_arrays.npz, ~30 min
    .venv/bin/python -m analysis.cbt.tables.make_tables --validate   # validation.npz
    .venv/bin/python -m analysis.cbt.tables.make_tables --long       # long_arrays.npz, ~20 min
    .venv/bin/python -m analysis.cbt.tables.make_tables --bound      # bound_points.npz, ~2 min
    .venv/bin/python -m analysis.cbt.tables.make_tables --held-out   # held_out.npz, ~2 min
    .venv/bin/python -m analysis.cbt.tables.make_tables --long-check # long_array_check.npz, ~10 min
    .venv/bin/python -m analysis.cbt.tables.make_tables --stray --workers 2  # stray_capacitance.npz
    .venv/bin/python -m analysis.cbt.tables.make_tables --stray-bound     # stray_bound_points.npz
    .venv/bin/python -m analysis.cbt.tables.make_tables --stray-held-out  # stray_held_out.npz

(``--workers 1`` keeps the short tables on one core; ``--reuse FILE`` / ``--resume`` keep what
an earlier run on the same settings computed.)

For each chain length N = 2, 3, 4 (uniform junctions, C_0 = 0, no offset charge) it solves the
orthodox master equation (analysis.cbt.tunnelling, docs/physics.md §1.3) on a grid of reduced bias x
and u = ΔE/(k_B T) and stores the reduced dip D_N(x, u) = (1 − G/G_T)/u, which tends to the
first-order dip function g(x) of Pekola et al., PRL 73, 2903 (1994) as u → 0 (used as the u = 0
row). The N = 4 solve is costly where the charge window is wide (small u, large x); there it is
done only for x <= X4_MAX (X4_MAX_STRONG for u >= 1) and u >= U4_MIN, and outside that region D_4 − D_3 is continued from
the region's edge (scaled by (u/U4_MIN)^2 below it, by D_3(x)/D_3(x_last) beyond the last solved x). Both
continuations act on a difference that is below 1e-6 in G/G_T there for u <= 3 (measured by the
validation in tests/test_full_model.py and benchmarks/bench_full_model.py); beyond x = 20 at
u = 4-5 the continuation errs by up to 1.6e-5 (u = 5, x = 25, measured), carried in the model
error. The mask of exactly solved nodes is stored with the table.

The exact N = 5, 6 tables, the points that bound their error, the held-out points and the
independent long-chain checks (exact N = 7, 8; orthodox Monte Carlo of N = 10-30) are described
at their constants below.
"""

from __future__ import annotations

import argparse
import logging
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

from analysis.cbt.models import dip_function
from analysis.cbt.tunnelling import (
    ArrayDescription,
    estimated_window_states,
    solve_bias_sweep,
    solve_master_equation,
)

TABLE_PATH = Path(__file__).with_name("short_arrays.npz")
VALIDATION_PATH = Path(__file__).with_name("validation.npz")
# Exact reference points off the tables, used to measure the long-array model's error: N = 5
# (the extrapolation tested out of sample; the 4-island solve limits x at small u) and N = 4
# where its table is a continuation rather than a solve (u < U4_MIN or x > X4_MAX).
VALIDATION_POINTS = (
    [(5, u, x) for u in (1.0, 1.5, 2.0) for x in (0.0, 1.4, 2.8, 4.2)]
    + [(5, u, x) for u in (2.5, 3.0) for x in (0.0, 1.4, 2.8, 4.2, 6.0, 9.0)]
    + [(5, 0.5, 0.0)]
    + [(4, u, x) for u in (0.2, 0.3) for x in (0.0, 2.7, 5.0)]
    + [(4, u, x) for u in (1.0, 2.0, 3.0) for x in (14.0, 19.3, 25.0)]
    + [(4, 0.5, 14.0)]
)
X_NODES = np.concatenate(
    (np.arange(0.0, 12.0, 0.2), np.arange(12.0, 20.0, 0.5), np.arange(20.0, 40.01, 1.0))
)
U_NODES = np.round(np.arange(0.0, 5.21, 0.1), 10)
LENGTHS = (2, 3, 4)
X4_MAX = 12.0
X4_MAX_STRONG = 20.0  # the tail is slower in stronger blockade: solve further out for u >= 1
U4_MIN = 0.5
SIGMAS = 7.0

logger = logging.getLogger(__name__)

# Exact N = 5 and 6 chains (--long). They are stored as conductances G/G_T on a coarser grid
# than the short tables; the model interpolates their difference from the N = 4 table, which is
# small and smooth. A node is solved only if its window holds at most LONG_MAX_STATES states
# (the window grows as T_eff^((N-1)/2) with bias, so N = 6 at u = 1.5 stops at x = 3.5); the
# model continues the difference beyond the last solved node. Cost on one core: ~35 min.
LONG_TABLE_PATH = Path(__file__).with_name("long_arrays.npz")
HELD_OUT_PATH = Path(__file__).with_name("held_out.npz")
LONG_LENGTHS = (5, 6)
# Quarter steps below x = 4: with half steps the bicubic interpolation of the N = 5, 6
# difference erred by up to 3e-4 in G/G_T near x = 0.75 at u = 4.75 (measured at BOUND_POINTS).
LONG_X_NODES = np.concatenate((np.arange(0.0, 4.0, 0.25), [4.0, 5.0, 6.0, 7.0, 8.0, 10.0, 12.0]))
LONG_U_NODES = np.array([1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0])
#: Window of the N = 5, 6 solves: changing 6 -> 7 sigmas moves G/G_T by <= 7e-7, 7 -> 8.5 by
#: <= 3e-9 (N = 5, u = 2-3, x = 0-12, measured); 6.5 sits between, and every row re-checks it.
LONG_SIGMAS = 6.5
LONG_PARTIAL_PATH = Path(__file__).with_name("long_arrays.partial.npz")
LONG_MAX_STATES = {5: 250_000, 6: 150_000}
WINDOW_CHECK_X = {5: (0.0, 4.0), 6: (0.0,)}
# Off-grid exact points that set the interpolation part of the N = 5, 6 model error
# (bound_points.npz) ...
BOUND_PATH = Path(__file__).with_name("bound_points.npz")
BOUND_POINTS = ([(5, u, x) for u in (2.25, 3.75, 4.75) for x in (0.75, 2.75, 4.5, 9.0)]
                + [(6, u, x) for u in (2.25, 3.75, 4.75) for x in (0.75, 2.75, 4.5)]
                + [(6, 4.75, 9.0)])
# ... and held-out ones that nothing is built from: only the tests compare the model with them.
HELD_OUT_POINTS = ([(5, u, x) for u in (1.75, 2.75, 4.25) for x in (1.25, 3.25, 6.5)]
                   + [(6, u, x) for u in (2.75, 4.25) for x in (1.25, 3.25)] + [(6, 4.25, 6.5)])


def _solve_row(task: tuple[int, float, np.ndarray]) -> tuple[int, float, np.ndarray, float, float]:
    n, u, xs = task
    array = ArrayDescription(n)
    out = np.empty(len(xs))
    worst_edge = 0.0
    start = time.perf_counter()
    for i, x in enumerate(xs):
        sol = solve_master_equation(array, float(x), float(u), sigmas=SIGMAS)
        out[i] = (1.0 - sol.conductance) / u
        worst_edge = max(worst_edge, sol.boundary_probability)
    return n, u, out, worst_edge, time.perf_counter() - start


def n4_x_limit(u: float) -> float:
    """Largest x at which the N = 4 table is solved exactly at this u."""
    return X4_MAX_STRONG if u >= 1.0 - 1e-9 else X4_MAX


def build_tables(workers: int = 2, reuse: dict[str, np.ndarray] | None = None) -> dict[str, np.ndarray]:
    nx, nu = len(X_NODES), len(U_NODES)
    tables = {n: np.full((nx, nu), np.nan) for n in LENGTHS}
    for n in LENGTHS:
        tables[n][:, 0] = dip_function(X_NODES)
    solved4 = np.zeros((nx, nu), dtype=bool)
    tasks = []
    for n in LENGTHS:
        for u in U_NODES[1:]:
            if n == 4:
                if u < U4_MIN - 1e-9:
                    continue
                xs = X_NODES[X_NODES <= n4_x_limit(u) + 1e-9]
            else:
                xs = X_NODES
            tasks.append((n, float(u), xs))
    if reuse is not None:
        # Same grid and solver settings: take the nodes an earlier run already solved (the
        # solves are deterministic, so the result equals a run from scratch).
        j_of = {float(u): j for j, u in enumerate(U_NODES)}
        pending = []
        old_columns = reuse["u_nodes"].size
        for n, u, xs in tasks:
            j = j_of[u]
            if j >= old_columns:
                pending.append((n, u, xs, 0))
                continue
            old = reuse[f"dip_{n}"][:, j]
            known = reuse["solved_4"][:, j] if n == 4 else np.ones(nx, dtype=bool)
            done = int(np.argmin(known[: len(xs)])) if not known[: len(xs)].all() else len(xs)
            tables[n][:done, j] = old[:done]
            if n == 4:
                solved4[:done, j] = True
            if done < len(xs):
                pending.append((n, u, xs[done:], done))
        tasks = pending
    else:
        tasks = [(n, u, xs, 0) for n, u, xs in tasks]
    # Expensive rows first so the pool stays busy to the end.
    tasks.sort(key=lambda t: (-t[0], t[1]))
    offsets = {(n, u): first for n, u, _, first in tasks}
    worst_edge = float(reuse["worst_edge_probability"]) if reuse is not None else 0.0
    with ProcessPoolExecutor(max_workers=workers) as pool:
        rows = pool.map(_solve_row, [(n, u, xs) for n, u, xs, _ in tasks])
        for n, u, row, edge, seconds in rows:
            j = int(np.argmin(np.abs(U_NODES - u)))
            first = offsets[(n, u)]
            tables[n][first : first + len(row), j] = row
            if n == 4:
                solved4[first : first + len(row), j] = True
            worst_edge = max(worst_edge, edge)
            logger.info("N=%d u=%.2f done in %.1f s (edge probability %.1e)", n, u, seconds, edge)
    # Continue D_4 − D_3 outside the exactly solved region (see module docstring).
    d3, d4 = tables[3], tables[4]
    ju = int(np.argmin(np.abs(U_NODES - U4_MIN)))
    ix = int(np.argmin(np.abs(X_NODES - X4_MAX)))
    diff = d4 - d3
    for j in range(1, ju):
        diff[: ix + 1, j] = diff[: ix + 1, ju] * (U_NODES[j] / U4_MIN) ** 2
    diff[:, 0] = 0.0
    for j in range(1, nu):
        last = int(np.nonzero(solved4[:, j])[0][-1]) if solved4[:, j].any() else ix
        scale = d3[last + 1 :, j] / d3[last, j]
        diff[last + 1 :, j] = diff[last, j] * scale
    tables[4] = d3 + diff
    return {
        "x_nodes": X_NODES,
        "u_nodes": U_NODES,
        "lengths": np.array(LENGTHS),
        "dip_2": tables[2],
        "dip_3": tables[3],
        "dip_4": tables[4],
        "solved_4": solved4,
        "window_sigmas": np.array(SIGMAS),
        "worst_edge_probability": np.array(worst_edge),
    }


def _solve_point(
    task: tuple[int, float, float], sigmas: float = SIGMAS
) -> tuple[int, float, float, float, float]:
    n, u, x = task
    start = time.perf_counter()
    sol = solve_master_equation(ArrayDescription(n), x, u, sigmas=sigmas)
    logger.info("N=%d u=%.2f x=%.2f: G/G_T = %.12f (%d states, edge %.1e, %.0f s)", n, u, x,
                sol.conductance, sol.n_states, sol.boundary_probability,
                time.perf_counter() - start)
    return n, u, x, sol.conductance, sol.boundary_probability


def build_validation(workers: int = 2) -> dict[str, np.ndarray]:
    # Roughly cheapest first (the state count grows with N, x and 1/u).
    tasks = sorted(VALIDATION_POINTS, key=lambda t: (t[0], (1 + t[2]) / t[1]))
    with ProcessPoolExecutor(max_workers=workers) as pool:
        rows = list(pool.map(_solve_point, tasks))
    arr = np.array(rows)
    return {"n": arr[:, 0].astype(int), "u": arr[:, 1], "x": arr[:, 2],
            "conductance": arr[:, 3], "edge_probability": arr[:, 4]}


def build_long_tables(resume: bool = False) -> dict[str, np.ndarray]:
    """Exact G/G_T for N = 5, 6 on LONG_X_NODES x LONG_U_NODES, with window checks (one core).

    Each finished (N, u) column is saved to LONG_PARTIAL_PATH, so that an interrupted run can
    continue with ``resume`` (the solves are deterministic).
    """
    shape = (LONG_X_NODES.size, LONG_U_NODES.size)
    out: dict[str, np.ndarray] = {"x_nodes": LONG_X_NODES, "u_nodes": LONG_U_NODES,
                                  "lengths": np.array(LONG_LENGTHS),
                                  "window_sigmas": np.array(LONG_SIGMAS),
                                  "max_states": np.array(sorted(LONG_MAX_STATES.items()))}
    for n in LONG_LENGTHS:
        for key in ("conductance", "edge_probability", "n_states"):
            out[f"{key}_{n}"] = np.full(shape, np.nan)
        out[f"done_{n}"] = np.zeros(LONG_U_NODES.size, dtype=bool)
    out["window_check"] = np.zeros((0, 4))
    previous: dict[str, np.ndarray] = {}
    if resume and LONG_PARTIAL_PATH.exists():
        with np.load(LONG_PARTIAL_PATH) as old:
            out.update({key: np.array(old[key]) for key in old.files})
    elif resume and LONG_TABLE_PATH.exists():
        # A finished table on other x nodes: keep the nodes it solved (same u nodes and window).
        with np.load(LONG_TABLE_PATH) as old:
            previous = {key: np.array(old[key]) for key in old.files}
        out["window_check"] = previous["window_check"]
    for n in LONG_LENGTHS:
        for j, u in enumerate(LONG_U_NODES):
            if out[f"done_{n}"][j]:
                continue
            start = time.perf_counter()
            array = ArrayDescription(n)
            budget = LONG_MAX_STATES[n]
            xs = [x for x in LONG_X_NODES
                  if estimated_window_states(array, float(x), float(u), LONG_SIGMAS) <= budget]
            known = {}
            if previous:
                for i, x in enumerate(previous["x_nodes"]):
                    if np.isfinite(previous[f"conductance_{n}"][i, j]):
                        known[float(x)] = tuple(previous[f"{key}_{n}"][i, j] for key in
                                                ("conductance", "edge_probability", "n_states"))
            todo = [x for x in xs if float(x) not in known]
            solved = dict(zip(todo, solve_bias_sweep(array, np.array(todo), float(u),
                                                     sigmas=LONG_SIGMAS), strict=True))
            for i, x in enumerate(xs):
                if float(x) in known:
                    g, e, k = known[float(x)]
                else:
                    sol = solved[x]
                    g, e, k = sol.conductance, sol.boundary_probability, sol.n_states
                out[f"conductance_{n}"][i, j] = g
                out[f"edge_probability_{n}"][i, j] = e
                out[f"n_states_{n}"][i, j] = k
            checks = []
            for x in WINDOW_CHECK_X[n] if not previous else ():
                sol = solve_master_equation(array, x, float(u), sigmas=LONG_SIGMAS,
                                            check_window=True)
                checks.append((n, u, x, sol.window_change))
            if checks:
                out["window_check"] = np.concatenate((out["window_check"], np.array(checks)))
            out[f"done_{n}"][j] = True
            np.savez_compressed(LONG_PARTIAL_PATH, **out)
            logger.info("N=%d u=%.2f: %d points to x = %g in %.0f s (max %d states, edge <= "
                        "%.1e, window change <= %.1e)", n, u, len(xs), xs[-1],
                        time.perf_counter() - start, np.nanmax(out[f"n_states_{n}"][:, j]),
                        np.nanmax(out[f"edge_probability_{n}"][:, j]),
                        max((c[3] for c in checks), default=float("nan")))
    return out


def build_points(points: list[tuple[int, float, float]]) -> dict[str, np.ndarray]:
    """Exact G/G_T at single (N, u, x) points, serially on one core."""
    rows = [_solve_point((n, u, x), sigmas=LONG_SIGMAS) for n, u, x in points]
    arr = np.array(rows)
    return {"n": arr[:, 0].astype(int), "u": arr[:, 1], "x": arr[:, 2],
            "conductance": arr[:, 3], "edge_probability": arr[:, 4]}


# Independent checks of the long-array continuation (--long-check): exact solutions of N = 7, 8
# chains (nothing is built from them; they choose LONG_ARRAY_LAW and measure its residual) ...
LONG_CHECK_PATH = Path(__file__).with_name("long_array_check.npz")
LONG_CHECK_EXACT = ([(7, u, x) for u in (3.0, 4.0, 5.0) for x in (0.0, 2.75, 4.0)]
                    + [(7, 2.0, 0.0), (7, 2.0, 2.75), (8, 2.0, 0.0), (8, 3.0, 0.0), (8, 4.0, 0.0),
                       (8, 4.0, 2.75), (8, 5.0, 0.0), (8, 5.0, 2.75), (8, 5.0, 4.0)]
                    + [(7, 1.5, 0.0), (7, 2.5, 0.0), (7, 2.5, 2.75), (8, 2.5, 0.0),
                       (7, 2.0, 1.5), (7, 2.5, 1.5)])
# ... and orthodox kinetic Monte Carlo currents J(x) of N = 10–30 chains.
LONG_CHECK_MC = [(n, u, 3.0) for n in (10, 20, 30) for u in (2.0, 3.0, 4.0)]
MC_REPLICAS = 400
MC_EVENTS = 2500


def build_long_check(resume: bool = False) -> dict[str, np.ndarray]:
    """Exact N = 7, 8 points and Monte Carlo currents of long chains (one core, ~15 min).

    With ``resume`` the points already in LONG_CHECK_PATH are kept and only new ones computed
    (exact solves and seeded Monte Carlo runs are deterministic).
    """
    from analysis.cbt.orthodox_mc import simulate_current  # noqa: PLC0415 (only this mode)

    old_exact: dict[tuple[int, float, float], tuple[float, float]] = {}
    old_mc: dict[tuple[int, float, float], tuple[float, ...]] = {}
    if resume and LONG_CHECK_PATH.exists():
        with np.load(LONG_CHECK_PATH) as old:
            for n, u, x, g, e in zip(old["exact_n"], old["exact_u"], old["exact_x"],
                                     old["exact_conductance"], old["exact_edge_probability"],
                                     strict=True):
                old_exact[(int(n), float(u), float(x))] = (float(g), float(e))
            for row in zip(old["mc_n"], old["mc_u"], old["mc_x"], old["mc_current"],
                           old["mc_standard_error"], old["mc_seed"], strict=True):
                old_mc[(int(row[0]), float(row[1]), float(row[2]))] = tuple(row)
    exact_rows = [(n, u, x, *old_exact[(n, u, x)]) if (n, u, x) in old_exact
                  else _solve_point((n, u, x), sigmas=LONG_SIGMAS) for n, u, x in LONG_CHECK_EXACT]
    arr = np.array(exact_rows)
    exact = {"n": arr[:, 0].astype(int), "u": arr[:, 1], "x": arr[:, 2],
             "conductance": arr[:, 3], "edge_probability": arr[:, 4]}
    rows = []
    for k, (n, u, x) in enumerate(LONG_CHECK_MC):
        if (n, u, x) in old_mc:
            rows.append(old_mc[(n, u, x)])
            continue
        start = time.perf_counter()
        mc = simulate_current(ArrayDescription(n), x, u, seed=20261202 + k,
                              n_replicas=MC_REPLICAS, events_per_replica=MC_EVENTS,
                              burn_in_events=max(500, 20 * n))
        rows.append((n, u, x, mc.current, mc.standard_error, mc.seed))
        logger.info("MC N=%d u=%.1f x=%.1f: J = %.6f ± %.1e (%.0f s)", n, u, x, mc.current,
                    mc.standard_error, time.perf_counter() - start)
    mc_arr = np.array(rows)
    out = {f"exact_{key}": value for key, value in exact.items()}
    out.update({"mc_n": mc_arr[:, 0].astype(int), "mc_u": mc_arr[:, 1], "mc_x": mc_arr[:, 2],
                "mc_current": mc_arr[:, 3], "mc_standard_error": mc_arr[:, 4],
                "mc_seed": mc_arr[:, 5].astype(np.int64),
                "mc_replicas": np.array(MC_REPLICAS), "mc_events": np.array(MC_EVENTS)})
    return out


# Chains with stray capacitance C_0 to ground (--stray): exact G/G_T for N = 2, 3, 4 at
# C_0/C = 0.05, 0.1, 0.15 and 0.2 (with two tables, at 0.1 and 0.2, the parabola in C_0 through
# them and C_0 = 0 erred by up to 7e-6 in G/G_T at C_0/C = 0.05 and 0.15, measured). The model (analysis.cbt.full_model) interpolates the difference of the
# reduced dip from the scaled C_0 = 0 dip r D_N(x, r u; 0), r = r_N(C_0/C) the first-order depth
# factor, a difference that vanishes identically for N = 2 (one island: C_0 only adds to its
# total capacitance) and is small and smooth for N = 3, 4. u is the nominal ΔE/k_BT with
# ΔE = ((N − 1)/N) e²/C, as for C_0 = 0. A node is solved if its window holds at most
# STRAY_MAX_STATES states; beyond the last solved x the model continues the difference in
# proportion to the base dip. Cost on one core of the shared machine: see docs/models.md.
STRAY_PATH = Path(__file__).with_name("stray_capacitance.npz")
STRAY_PARTIAL_PATH = Path(__file__).with_name("stray_capacitance.partial.npz")
STRAY_LENGTHS = (2, 3, 4)
STRAY_C0_RATIOS = (0.05, 0.1, 0.15, 0.2)
STRAY_X_NODES = np.concatenate((np.arange(0.0, 4.0, 0.25), np.arange(4.0, 12.0, 0.5),
                                np.arange(12.0, 20.0, 1.0), np.arange(20.0, 40.01, 4.0)))
STRAY_U_NODES = np.array([0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0])
STRAY_SIGMAS = 7.0
STRAY_MAX_STATES = {2: 10_000, 3: 20_000, 4: 30_000}
# Off-grid exact points with C_0 > 0 that set the model error of the stray-capacitance tables
# (stray_bound_points.npz, window as the tables) ...
STRAY_BOUND_PATH = Path(__file__).with_name("stray_bound_points.npz")
STRAY_BOUND_POINTS = (
    [(n, c0, u, x) for n in (3, 4) for c0 in (0.1, 0.2) for u, x in
     ((0.4, 0.6), (0.9, 3.1), (1.75, 1.4), (2.25, 5.5), (3.75, 0.6), (4.6, 2.9), (4.9, 9.5))]
    + [(n, c0, u, x) for n in (3, 4) for c0 in (0.03, 0.125)
       for u, x in ((1.5, 1.0), (3.5, 2.0), (4.75, 0.0))]
    # N = 4 beyond its last solved x, where the difference is continued
    + [(4, 0.1, 0.4, 6.5), (4, 0.2, 0.9, 13.0), (4, 0.2, 1.25, 17.0)]
)
# ... and held-out ones, off the grid in x, u and C_0/C (0.025, 0.075, 0.175 check the
# interpolation between the tables in C_0), that nothing is built from: only the tests compare the model with
# them. They are solved with a window one σ wider than the tables', so that they check the
# window truncation too.
STRAY_HELD_OUT_PATH = Path(__file__).with_name("stray_held_out.npz")
STRAY_HELD_OUT_SIGMAS = 8.0
STRAY_HELD_OUT_POINTS = (
    [(n, c0, u, x) for n in (3, 4) for c0 in (0.1, 0.2) for u, x in
     ((0.6, 1.1), (1.25, 2.6), (2.75, 0.4), (3.25, 4.75), (4.25, 1.6), (4.75, 7.25))]
    + [(n, c0, u, x) for n in (3, 4) for c0 in (0.025, 0.075, 0.175) for u, x in
       ((1.0, 0.0), (2.0, 3.0), (3.0, 0.0), (4.0, 2.5), (5.0, 0.0))]
    + [(2, 0.175, u, x) for u, x in ((0.8, 2.2), (3.6, 5.3), (4.9, 0.0))]
)


def _solve_stray_column(task: tuple[int, float, float]) -> tuple[list[float], list, float]:
    n, c0, u = task
    start = time.perf_counter()
    array = ArrayDescription(n, c0_ratio=c0)
    xs = [float(x) for x in STRAY_X_NODES if estimated_window_states(
        array, float(x), u, STRAY_SIGMAS) <= STRAY_MAX_STATES[n]]
    sols = solve_bias_sweep(array, np.array(xs), u, sigmas=STRAY_SIGMAS)
    rows = [(s.conductance, s.boundary_probability, s.n_states) for s in sols]
    return xs, rows, time.perf_counter() - start


def build_stray_tables(resume: bool = False, workers: int = 1) -> dict[str, np.ndarray]:
    """Exact G/G_T with C_0 > 0 on STRAY_X_NODES x STRAY_U_NODES (resumable; one bias sweep
    per (N, C_0, u) column, ``workers`` columns at a time)."""
    shape = (len(STRAY_C0_RATIOS), STRAY_X_NODES.size, STRAY_U_NODES.size)
    out: dict[str, np.ndarray] = {
        "x_nodes": STRAY_X_NODES, "u_nodes": STRAY_U_NODES, "lengths": np.array(STRAY_LENGTHS),
        "c0_ratios": np.array(STRAY_C0_RATIOS), "window_sigmas": np.array(STRAY_SIGMAS),
        "max_states": np.array(sorted(STRAY_MAX_STATES.items()))}
    for n in STRAY_LENGTHS:
        for key in ("conductance", "edge_probability", "n_states"):
            out[f"{key}_{n}"] = np.full(shape, np.nan)
        out[f"done_{n}"] = np.zeros(shape[::2], dtype=bool)
        out[f"seconds_{n}"] = np.zeros(shape[::2])
    if resume and STRAY_PARTIAL_PATH.exists():
        with np.load(STRAY_PARTIAL_PATH) as old:
            out.update({key: np.array(old[key]) for key in old.files})
    tasks = [(n, float(c0), float(u)) for n in STRAY_LENGTHS
             for k, c0 in enumerate(STRAY_C0_RATIOS) for j, u in enumerate(STRAY_U_NODES)
             if not out[f"done_{n}"][k, j]]
    with ProcessPoolExecutor(max_workers=workers) as pool:
        for (n, c0, u), (xs, rows, seconds) in zip(tasks, pool.map(_solve_stray_column, tasks),
                                                    strict=True):
            k = STRAY_C0_RATIOS.index(c0)
            j = int(np.argmin(np.abs(STRAY_U_NODES - u)))
            for i, (g, e, size) in enumerate(rows):
                out[f"conductance_{n}"][k, i, j] = g
                out[f"edge_probability_{n}"][k, i, j] = e
                out[f"n_states_{n}"][k, i, j] = size
            out[f"done_{n}"][k, j] = True
            out[f"seconds_{n}"][k, j] = seconds
            np.savez_compressed(STRAY_PARTIAL_PATH, **out)
            logger.info("N=%d C0/C=%.2f u=%.2f: %d points to x = %g in %.0f s (max %d states, "
                        "edge <= %.1e)", n, c0, u, len(xs), xs[-1], seconds,
                        np.nanmax(out[f"n_states_{n}"][k, :, j]),
                        np.nanmax(out[f"edge_probability_{n}"][k, :, j]))
    return out


def build_stray_points(points, sigmas: float = STRAY_SIGMAS) -> dict[str, np.ndarray]:
    """Exact G/G_T with C_0 > 0 at single (N, C_0/C, u, x) points, serially on one core."""
    rows = []
    for n, c0, u, x in points:
        start = time.perf_counter()
        sol = solve_master_equation(ArrayDescription(n, c0_ratio=c0), x, u, sigmas=sigmas)
        rows.append((n, c0, u, x, sol.conductance, sol.boundary_probability))
        logger.info("N=%d C0/C=%.2f u=%.2f x=%.2f: G/G_T = %.12f (%d states, edge %.1e, %.0f s)",
                    n, c0, u, x, sol.conductance, sol.n_states, sol.boundary_probability,
                    time.perf_counter() - start)
    arr = np.array(rows)
    return {"n": arr[:, 0].astype(int), "c0_ratio": arr[:, 1], "u": arr[:, 2], "x": arr[:, 3],
            "conductance": arr[:, 4], "edge_probability": arr[:, 5], "window_sigmas": np.array(sigmas)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--reuse", type=Path, default=None,
                        help="earlier table on the same grid whose solved nodes are kept")
    parser.add_argument("--validate", action="store_true",
                        help="compute the exact off-table reference points instead of the tables")
    parser.add_argument("--long", action="store_true",
                        help="compute the exact N = 5, 6 tables (one core, ~25 min)")
    parser.add_argument("--resume", action="store_true",
                        help="with --long, --stray or --long-check: keep what an earlier run computed")
    parser.add_argument("--bound", action="store_true",
                        help="compute the off-grid N = 5, 6 points that set the model error")
    parser.add_argument("--long-check", action="store_true",
                        help="exact N = 7, 8 points and Monte Carlo of N = 10-30 (~15 min)")
    parser.add_argument("--stray", action="store_true",
                        help="exact N = 2-4 tables with C_0/C = 0.05, 0.1, 0.15, 0.2 (N = 4: ~40 min of CPU)")
    parser.add_argument("--stray-bound", action="store_true",
                        help="off-grid points with C_0 > 0 that set the tables' model error")
    parser.add_argument("--stray-held-out", action="store_true",
                        help="held-out points with C_0 > 0 that only the tests use")
    parser.add_argument("--held-out", action="store_true",
                        help="compute the held-out N = 5, 6 points that only the tests use")
    args = parser.parse_args()
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(message)s")
    if args.stray:
        out, data = STRAY_PATH, build_stray_tables(args.resume, args.workers)
    elif args.stray_bound:
        out, data = STRAY_BOUND_PATH, build_stray_points(STRAY_BOUND_POINTS)
    elif args.stray_held_out:
        out, data = STRAY_HELD_OUT_PATH, build_stray_points(STRAY_HELD_OUT_POINTS,
                                                             STRAY_HELD_OUT_SIGMAS)
    elif args.long:
        out, data = LONG_TABLE_PATH, build_long_tables(args.resume)
    elif args.long_check:
        out, data = LONG_CHECK_PATH, build_long_check(args.resume)
    elif args.bound:
        out, data = BOUND_PATH, build_points(BOUND_POINTS)
    elif args.held_out:
        out, data = HELD_OUT_PATH, build_points(HELD_OUT_POINTS)
    elif args.validate:
        out, data = VALIDATION_PATH, build_validation(args.workers)
    else:
        reuse = None
        if args.reuse is not None:
            with np.load(args.reuse) as old:
                reuse = {key: np.array(old[key]) for key in old.files}
        out, data = TABLE_PATH, build_tables(args.workers, reuse)
    np.savez_compressed(out, **data)
    logger.info("wrote %s (%.0f kB)", out, out.stat().st_size / 1024)


if __name__ == "__main__":
    main()
