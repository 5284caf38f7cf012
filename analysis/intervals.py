"""Recalibration intervals from an item's drift and the laboratory's maximum permissible change.

ILAC-G24:2007 / OIML D 10:2007, *Guidelines for the determination of calibration intervals of
measuring instruments*, describes five methods of reviewing intervals (from memory). Two of them
fit an archive that holds every earlier calibration of an item:

* **Method 2, control chart (calendar time).** The results of repeated calibrations are charted
  against time; their scatter and drift give the time after which the item is expected to leave
  its permissible range. :func:`drift_interval` does this with the drift models of
  :mod:`analysis.drift`: the interval is the longest time τ after the last calibration for which
  the probability that the change x(t_n + τ) − x(t_n) stays within ±Δ (the laboratory's maximum
  permissible change) is at least the reliability target R. With the change distributed as
  N(m(τ), s(τ)²),

      P(τ) = Φ((Δ − m)/s) − Φ((−Δ − m)/s),

  m = b τ, s = u(b) τ for a linear drift and m = 0, s = √(q τ) for a random walk; P falls with τ,
  and P(τ) = R is solved by bracketed root finding (closed form for the random walk,
  τ = (Δ / z)² / q with z = Φ⁻¹((1 + R)/2)). An "end-of-period reliability target" of this kind
  is how NCSL International's RP-1 frames interval analysis (from memory).
* **Method 1, automatic adjustment or "staircase" (calendar time).** Each time an item is
  calibrated the next interval is lengthened if it was found within tolerance and shortened if
  it was not. ILAC-G24 leaves the factors to the laboratory; :func:`staircase_interval` takes them
  as arguments.

Neither method is a rule of accreditation: the laboratory's quality system sets intervals, and
these figures are advice to it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import optimize, special

from analysis.drift import DriftModel, HistoryError

DRIFT_METHOD = "ILAC-G24:2007 / OIML D 10:2007 method 2 (control chart, calendar time)"
STAIRCASE_METHOD = "ILAC-G24:2007 / OIML D 10:2007 method 1 (automatic adjustment, staircase)"


@dataclass(frozen=True)
class RecallInterval:
    """A recommended recalibration interval and what limits it."""

    method: str
    interval_days: float
    #: "drift" (method 2) or "last calibration" (method 1), else the bound that applied:
    #: "maximum interval" or "minimum interval"
    limited_by: str
    unlimited_interval_days: float  #: before the laboratory's bounds (inf if drift never limits)
    max_permissible_change: float
    reliability_target: float
    model: str
    note: str = ""


def in_tolerance_probability(
    model: DriftModel, elapsed_days: float, max_permissible_change: float
) -> float:
    """P(|x(t_n + τ) − x(t_n)| ≤ Δ) under the model's change distribution N(m, s²)."""
    m, s = model.change_after(elapsed_days)
    m, s = float(m), float(s)
    if s == 0.0:
        return 1.0 if abs(m) <= max_permissible_change else 0.0
    return float(
        special.ndtr((max_permissible_change - m) / s)
        - special.ndtr((-max_permissible_change - m) / s)
    )


def drift_interval(
    model: DriftModel,
    max_permissible_change: float,
    *,
    reliability_target: float = 0.95,
    maximum_interval_days: float,
    minimum_interval_days: float = 0.0,
) -> RecallInterval:
    """The longest τ with P(|change| ≤ Δ) ≥ R, bounded by the laboratory's limits (method 2).

    ``max_permissible_change`` Δ is in the unit of the history's values. The result is clipped to
    [minimum_interval_days, maximum_interval_days]; ``limited_by`` says which bound applied.
    """
    if not (math.isfinite(max_permissible_change) and max_permissible_change > 0):
        raise HistoryError("the maximum permissible change must be a positive number")
    if not 0 < reliability_target < 1:
        raise HistoryError("the reliability target must lie strictly between 0 and 1")
    if not (math.isfinite(maximum_interval_days) and maximum_interval_days > 0):
        raise HistoryError("the maximum interval must be a positive number of days")
    if not 0 <= minimum_interval_days <= maximum_interval_days:
        raise HistoryError("the minimum interval must lie between 0 and the maximum interval")
    if model.kind == "stable":
        raise HistoryError(
            "a stable-item model has no change to limit the interval; use the linear drift "
            "(DriftAnalysis.interval_model)"
        )
    delta = max_permissible_change
    note = ""

    def shortfall(tau: float) -> float:
        return in_tolerance_probability(model, tau, delta) - reliability_target

    if model.kind == "random_walk" and model.diffusion_per_day > 0:
        z = special.ndtri(0.5 * (1.0 + reliability_target))
        unlimited = (delta / z) ** 2 / model.diffusion_per_day
    elif shortfall(maximum_interval_days) >= 0:
        unlimited = math.inf
        note = "the change stays within the permissible range for the whole maximum interval"
    else:
        # P(τ) decreases from 1 (τ → 0) to below R at the maximum interval: one crossing.
        lo = maximum_interval_days * 1e-9
        if shortfall(lo) < 0:
            unlimited = 0.0
        else:
            unlimited = optimize.brentq(shortfall, lo, maximum_interval_days, xtol=1e-9, rtol=1e-12)
    interval, limited_by = unlimited, "drift"
    if interval > maximum_interval_days:
        interval, limited_by = maximum_interval_days, "maximum interval"
    if interval < minimum_interval_days:
        interval, limited_by = minimum_interval_days, "minimum interval"
        note = (
            "the drift would call for a shorter interval than the laboratory's minimum: "
            "review the item"
        )
    return RecallInterval(
        DRIFT_METHOD,
        float(interval),
        limited_by,
        float(unlimited),
        delta,
        reliability_target,
        model.kind,
        note,
    )


def staircase_interval(
    previous_interval_days: float,
    in_tolerance: bool,
    *,
    lengthen_factor: float,
    shorten_factor: float,
    maximum_interval_days: float,
    minimum_interval_days: float = 0.0,
) -> RecallInterval:
    """Next interval = previous × lengthen_factor if in tolerance, × shorten_factor if not (method 1).

    The factors are the laboratory's (ILAC-G24 names none): lengthen_factor ≥ 1 > shorten_factor > 0.
    """
    if not (math.isfinite(previous_interval_days) and previous_interval_days > 0):
        raise HistoryError("the previous interval must be a positive number of days")
    if not (lengthen_factor >= 1.0 and 0.0 < shorten_factor < 1.0):
        raise HistoryError("need lengthen_factor >= 1 and 0 < shorten_factor < 1")
    if not 0 <= minimum_interval_days <= maximum_interval_days:
        raise HistoryError("the minimum interval must lie between 0 and the maximum interval")
    unlimited = previous_interval_days * (lengthen_factor if in_tolerance else shorten_factor)
    interval, limited_by = unlimited, "last calibration"
    if interval > maximum_interval_days:
        interval, limited_by = maximum_interval_days, "maximum interval"
    if interval < minimum_interval_days:
        interval, limited_by = minimum_interval_days, "minimum interval"
    return RecallInterval(
        STAIRCASE_METHOD,
        float(interval),
        limited_by,
        float(unlimited),
        math.nan,
        math.nan,
        "in tolerance" if in_tolerance else "out of tolerance",
    )
