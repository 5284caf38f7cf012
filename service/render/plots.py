"""Plots for certificates, as deterministic SVG strings (matplotlib, Agg backend)."""

from __future__ import annotations

import io

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

plt.rcParams["svg.hashsalt"] = "coldcert"  # stable element ids: same data, same bytes
plt.rcParams["svg.fonttype"] = "none"


def to_svg(fig) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": "coldcert"}, bbox_inches="tight")
    plt.close(fig)
    return buf.getvalue()


def sweep_fit_svg(bias: np.ndarray, conductance: np.ndarray, model: np.ndarray, title: str) -> str:
    """Data and model (top) and residuals (bottom) of one CBT sweep."""
    order = np.argsort(bias)
    v = bias[order] * 1e3
    g = conductance[order] * 1e6
    m = model[order] * 1e6
    fig, (ax, axr) = plt.subplots(2, 1, figsize=(6.4, 4.8), sharex=True,
                                  gridspec_kw={"height_ratios": [3, 1]})
    ax.plot(v, g, ".", ms=2.5, color="0.35", label="measured")
    ax.plot(v, m, "-", lw=1.2, color="tab:blue", label="model")
    ax.set_ylabel("conductance (µS)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    axr.plot(v, (g - m) * 1e3, ".", ms=2.5, color="tab:red")
    axr.axhline(0.0, color="0.5", lw=0.8)
    axr.set_xlabel("bias (mV)")
    axr.set_ylabel("residual (nS)")
    fig.align_ylabels()
    return to_svg(fig)
