"""Plots of an item's history, as deterministic SVG (through service.plots)."""

from __future__ import annotations

from collections.abc import Mapping
from datetime import date
from typing import Any

import numpy as np

from service.render.plots import plt, to_svg


def _scale(unit: str, values: np.ndarray) -> tuple[float, str]:
    """A display factor so that the axis reads in mK, µS, ... rather than 1e-3 K."""
    top = float(np.max(np.abs(values))) if values.size else 1.0
    prefixes = ((1e-9, "n"), (1e-6, "µ"), (1e-3, "m"), (1.0, ""))
    if unit in ("K", "S", "V") and top > 0:
        for factor, prefix in prefixes:
            if top < 1000 * factor:
                return 1.0 / factor, prefix + unit
    return 1.0, unit


def drift_svg(quantity: Mapping[str, Any], analysis: Any = None) -> str:
    """Values with ±U bars against date, the chosen drift model, its prediction band and the
    due date, for one quantity of an item's history."""
    points = quantity["points"]
    days = np.array([date.fromisoformat(p["date"]).toordinal() for p in points], dtype=float)
    values = np.array([p["value"] for p in points])
    expanded = np.array([p["expanded_uncertainty"] for p in points])
    factor, unit = _scale(quantity.get("unit", ""), values)
    fig, ax = plt.subplots(figsize=(6.4, 3.4))
    ax.errorbar(
        [date.fromordinal(int(d)) for d in days],
        values * factor,
        yerr=expanded * factor,
        fmt="o",
        ms=4,
        color="0.2",
        capsize=3,
        label="calibrations (±U)",
    )
    model = getattr(analysis, "chosen", None)
    due = quantity.get("_due_date")
    if model is not None and days.size >= 2 and days[-1] > days[0]:
        end = days[-1] + max(0.25 * (days[-1] - days[0]), 90.0)
        if due:
            end = max(end, date.fromisoformat(due).toordinal() + 30.0)
        grid = np.linspace(days[0], end, 120)
        preds = [model.predict(float(t)) for t in grid]
        centre = np.array([p.value for p in preds]) * factor
        half = np.array([p.expanded_uncertainty for p in preds]) * factor
        dates = [date.fromordinal(int(round(t))) for t in grid]
        label = {"stable": "stable", "linear": "linear drift", "random_walk": "random walk"}[
            model.kind
        ]
        ax.plot(dates, centre, "-", color="tab:blue", lw=1.2, label=f"model: {label}")
        ax.fill_between(
            dates,
            centre - half,
            centre + half,
            color="tab:blue",
            alpha=0.15,
            lw=0,
            label="prediction ±U",
        )
    if due:
        ax.axvline(date.fromisoformat(due), color="tab:red", lw=1.0, ls="--", label=f"due {due}")
    ax.set_ylabel(f"value ({unit})" if unit else "value", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.set_title(quantity.get("name", ""), fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    fig.autofmt_xdate()
    return to_svg(fig)


def curve_difference_svg(difference: Mapping[str, Any]) -> str:
    """ΔT/T against R between two calibrations, with the ±U(ΔT)/T band."""
    rows = difference.get("rows") or []
    r = np.array([row["resistance_ohm"] for row in rows])
    t1 = np.array([row["first_temperature_K"] for row in rows])
    dt = np.array([row["difference_K"] for row in rows]) / t1 * 100
    big_u = np.array([row["expanded_uncertainty_K"] for row in rows]) / t1 * 100
    fig, ax = plt.subplots(figsize=(6.4, 3.0))
    ax.fill_between(r, -big_u, big_u, color="0.85", lw=0, label="±U(ΔT)")
    ax.plot(r, dt, "o-", ms=3, color="tab:blue", lw=1.0, label="ΔT / T")
    ax.axhline(0.0, color="0.5", lw=0.8)
    ax.set_xscale("log")
    ax.set_xlabel("resistance (Ω)", fontsize=8)
    ax.set_ylabel("ΔT / T (%)", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.set_title(f"{difference['second']} − {difference['first']}", fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    return to_svg(fig)


def history_plots(history: Mapping[str, Any]) -> dict[str, str]:
    """Every plot of a history by a stable key: ``drift-<i>`` and ``difference-<i>``."""
    plots: dict[str, str] = {}
    due = (history.get("recall") or {}).get("due_date")
    for i, q in enumerate(history.get("quantities") or []):
        if not q.get("points"):
            continue
        view = dict(q)
        view["_due_date"] = due
        plots[f"drift-{i}"] = drift_svg(view, q.get("_analysis"))
    for i, d in enumerate(history.get("curve_differences") or []):
        if d.get("rows"):
            plots[f"difference-{i}"] = curve_difference_svg(d)
    return plots
