"""Validation figures of the long-array full tunnelling model (docs/models.md).

Run from the repository root after the tables exist (a few seconds):

    .venv/bin/python docs/figures/make_model_figures.py

Writes docs/figures/cbt_depth_vs_n.svg, cbt_width_vs_n.svg, cbt_model_residuals.svg and
cbt_stray_capacitance.svg from the committed tables (analysis/cbt/tables/*.npz): exact master-equation points, the orthodox Monte
Carlo points and the model FullTunnellingShape(N).
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from scipy.integrate import quad  # noqa: E402
from scipy.optimize import brentq  # noqa: E402

from analysis.cbt.full_model import (  # noqa: E402
    FullTunnellingShape,
    exact_long_dips,
    first_order_depth_factor,
)

OUT = Path(__file__).parent
U_VALUES = (1.0, 2.0, 3.0, 4.0, 5.0)
LENGTHS = (2, 3, 4, 5, 6, 7, 8, 10, 14, 20, 30, 50, 100)


def _load(name: str) -> dict[str, np.ndarray]:
    ref = resources.files("analysis.cbt.tables").joinpath(name)
    with resources.as_file(ref) as path, np.load(path) as data:
        return {key: np.array(data[key]) for key in data.files}


def _fwhm(shape: FullTunnellingShape, u: float) -> float:
    level = 1.0 - 0.5 * (1.0 - float(shape(0.0, u)))
    return 2.0 * brentq(lambda x: float(shape(x, u)) - level, 0.5, 30.0, xtol=1e-10)


def depth_and_width_vs_n() -> None:
    check = _load("long_array_check.npz")
    fig_d, ax_d = plt.subplots(figsize=(6.4, 4.2))
    fig_w, ax_w = plt.subplots(figsize=(6.4, 4.2))
    for u in U_VALUES:
        lengths = [n for n in LENGTHS if FullTunnellingShape(n).max_u >= u]
        shapes = {n: FullTunnellingShape(n) for n in lengths}
        ref_n = lengths[-1]
        d_ref = 1.0 - float(shapes[ref_n](0.0, u))
        depth = np.array([1.0 - float(shapes[n](0.0, u)) for n in lengths])
        inv_n = 1.0 / np.array(lengths)
        (line,) = ax_d.plot(inv_n, (depth - d_ref) * 1e4, "-", lw=1, label=f"model, u = {u:g}")
        exact_n = [n for n in lengths if n <= 6]
        ax_d.plot(1.0 / np.array(exact_n), (depth[: len(exact_n)] - d_ref) * 1e4, "o",
                  color=line.get_color(), ms=4)
        sel = (check["exact_x"] == 0.0) & np.isclose(check["exact_u"], u)
        if sel.any():
            ax_d.plot(1.0 / check["exact_n"][sel], (1 - check["exact_conductance"][sel] - d_ref)
                      * 1e4, "s", mfc="none", color=line.get_color(), ms=6)
        w_ref = _fwhm(shapes[ref_n], u)
        width = np.array([_fwhm(shapes[n], u) for n in lengths])
        (wl,) = ax_w.plot(inv_n, (width / w_ref - 1) * 1e4, "-", lw=1, label=f"model, u = {u:g}")
        ax_w.plot(1.0 / np.array(exact_n), (width[: len(exact_n)] / w_ref - 1) * 1e4, "o",
                  color=wl.get_color(), ms=4)
    ax_d.set_xlabel("1/N")
    ax_d.set_ylabel("depth − depth(longest validated N)  [1e-4]")
    ax_d.set_title("Dip depth vs chain length (dots: exact tables N ≤ 6; squares: exact N = 7, 8)",
                   fontsize=8)
    ax_d.set_ylim(-8, 8)
    ax_d.legend(fontsize=7)
    ax_w.set_xlabel("1/N")
    ax_w.set_ylabel("FWHM / FWHM(longest validated N) − 1  [1e-4]")
    ax_w.set_title("Dip width vs chain length (dots: exact tables N ≤ 6)", fontsize=8)
    ax_w.legend(fontsize=7)
    fig_d.tight_layout()
    fig_w.tight_layout()
    fig_d.savefig(OUT / "cbt_depth_vs_n.svg")
    fig_w.savefig(OUT / "cbt_width_vs_n.svg")


def residuals() -> None:
    fig, (ax_e, ax_m) = plt.subplots(1, 2, figsize=(9.6, 4.0))
    sets = [("bound_points.npz", "bound (sets the error)", "o"),
            ("held_out.npz", "held out (tests only)", "^")]
    check = _load("long_array_check.npz")
    for name, label, marker in sets:
        data = _load(name)
        res = [float(FullTunnellingShape(int(n))(x, u)) - g for n, u, x, g in
               zip(data["n"], data["u"], data["x"], data["conductance"], strict=True)]
        ax_e.semilogy(data["u"], np.abs(res), marker, ms=5, mfc="none", label=f"N = 5, 6 {label}")
    # Beyond max_u (N > 6, u > 2) the continuation is evaluated anyway, to show why it is refused.
    res = [1.0 - u * float(FullTunnellingShape(int(n))._reference_reduced(x, u)) - g
           for n, u, x, g in zip(check["exact_n"], check["exact_u"], check["exact_x"],
                                 check["exact_conductance"], strict=True)]
    ax_e.semilogy(check["exact_u"], np.maximum(np.abs(res), 1e-10), "s", ms=5, mfc="none",
                  label="N = 7, 8 exact")
    us = np.linspace(0.05, 5.0, 200)
    for n, style in ((6, ":"), (8, "--"), (30, "-")):
        shape = FullTunnellingShape(n)
        ok = us[us <= shape.max_u]
        ax_e.semilogy(ok, [shape.model_error(u) for u in ok], style, lw=1,
                      label=f"model_error, N = {n}")
    ax_e.set_xlabel("u = ΔE/k_BT")
    ax_e.set_ylabel("|G_model − G_exact| / G_T")
    ax_e.legend(fontsize=7)
    ax_e.set_title("Model against exact solutions not used to build it", fontsize=8)
    for n in sorted(set(check["mc_n"])):
        sel = check["mc_n"] == n
        diffs, errs = [], []
        for u, x, j, se in zip(check["mc_u"][sel], check["mc_x"][sel], check["mc_current"][sel],
                               check["mc_standard_error"][sel], strict=True):
            shape = FullTunnellingShape(int(n))
            model = quad(lambda t, s=shape, uu=u: 1.0 - uu * float(s._reference_reduced(t, uu)),
                         0.0, x, epsabs=1e-12)[0]
            diffs.append((j - model) * 1e4)
            errs.append(se * 1e4)
        ax_m.errorbar(check["mc_u"][sel] + 0.03 * (n / 10 - 2), diffs, yerr=errs, fmt="o",
                      ms=4, capsize=2, label=f"N = {n}")
    ax_m.axhline(0.0, color="k", lw=0.5)
    ax_m.set_xlabel("u = ΔE/k_BT")
    ax_m.set_ylabel("J_MC − J_model at x = 3  [1e-4]")
    ax_m.set_title("Monte Carlo of long chains minus the model (±1 σ; u > 2 beyond its range)",
                   fontsize=8)
    ax_m.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(OUT / "cbt_model_residuals.svg")


def stray_capacitance() -> None:
    """Depth and residuals of the C_0 > 0 model against the exact tables and held-out points."""
    table = _load("stray_capacitance.npz")
    held = _load("stray_held_out.npz")
    bound = _load("stray_bound_points.npz")
    fig, (ax_d, ax_e) = plt.subplots(1, 2, figsize=(9.6, 4.0))
    c0s = np.linspace(0.0, 0.2, 41)
    for n, style in ((3, "-"), (4, "--")):
        for u in (1.0, 3.0, 5.0):
            # The depth beyond the rescaled C_0 = 0 chain: 1 − G(0, u; C_0) − depth_0(r u).
            def extra(c0: float, g: float | None = None, n: int = n, u: float = u) -> float:
                r = first_order_depth_factor(n, c0)
                g0 = float(FullTunnellingShape(n)(0.0, r * u))
                g = float(FullTunnellingShape(n, c0)(0.0, u)) if g is None else g
                return (g0 - g) * 1e4
            (line,) = ax_d.plot(c0s, [extra(c) if c else 0.0 for c in c0s], style, lw=1,
                                label=f"model N = {n}, u = {u:g}")
            j = int(np.argmin(np.abs(table["u_nodes"] - u)))
            ax_d.plot(table["c0_ratios"], [extra(c, g) for c, g in zip(
                table["c0_ratios"], table[f"conductance_{n}"][:, 0, j], strict=True)], "o",
                color=line.get_color(), ms=4)
            sel = (held["n"] == n) & np.isclose(held["u"], u) & (held["x"] == 0.0)
            ax_d.plot(held["c0_ratio"][sel], [extra(c, g) for c, g in zip(
                held["c0_ratio"][sel], held["conductance"][sel], strict=True)], "^",
                mfc="none", color=line.get_color(), ms=6)
    ax_d.set_xlabel("C_0/C")
    ax_d.set_ylabel("depth − depth of the rescaled C_0 = 0 chain  [1e-4]")
    ax_d.set_title("Zero-bias depth with stray capacitance (dots: tables; triangles: held out)",
                   fontsize=8)
    ax_d.legend(fontsize=6)
    for data, label, marker in ((bound, "bound (sets the error)", "o"),
                                (held, "held out (tests only)", "^")):
        res = [abs(float(FullTunnellingShape(int(n), float(c))(x, u)) - g) for n, c, u, x, g in
               zip(data["n"], data["c0_ratio"], data["u"], data["x"], data["conductance"],
                   strict=True)]
        ax_e.semilogy(data["u"], np.maximum(res, 1e-12), marker, ms=5, mfc="none", label=label)
    us = np.linspace(0.05, 5.0, 200)
    for n, style in ((3, "-"), (4, "--")):
        shape = FullTunnellingShape(n, 0.1)
        ax_e.semilogy(us, [shape.model_error(u) for u in us], style, lw=1,
                      label=f"model_error, N = {n}, C_0 > 0")
    ax_e.set_xlabel("u = ΔE/k_BT (nominal, ΔE = ((N − 1)/N) e²/C)")
    ax_e.set_ylabel("|G_model − G_exact| / G_T")
    ax_e.set_title("C_0 > 0 model against exact solutions off its tables", fontsize=8)
    ax_e.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(OUT / "cbt_stray_capacitance.svg")


def main() -> None:
    plt.rcParams["svg.hashsalt"] = "coldcert"  # repeatable SVG ids
    plt.rcParams["svg.fonttype"] = "none"
    exact_long_dips()
    depth_and_width_vs_n()
    residuals()
    stray_capacitance()


if __name__ == "__main__":
    main()
