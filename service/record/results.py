"""One builder for the entries of the record's ``results[]``.

Every calibration kind reports its results the same way: the estimate with its combined and
expanded uncertainty, coverage factor and probability and effective degrees of freedom (GUM,
JCGM 100:2008, 6 and G.4), the same figures rounded for the reader (GUM 7.2.6), and the full
budget. The kind adds what is particular to it (fit details, diagnostics, record statistics).
"""

from __future__ import annotations

import math
from typing import Any

from analysis.budget import Budget, round_for_report


def reported(value: float, u: float, expanded: float, unit: str) -> dict[str, str]:
    """The value and uncertainties rounded for the certificate (two significant digits of u)."""
    value_s, u_s = round_for_report(value, u)
    _, expanded_s = round_for_report(value, expanded)
    return {"value": value_s, "standard_uncertainty": u_s, "expanded_uncertainty": expanded_s,
            "unit": unit}


def result_entry(*, name: str, sweep: str, quantity: str, unit: str, budget: Budget,
                 **extra: Any) -> dict[str, Any]:
    """A ``results[]`` entry from a combined budget; ``extra`` holds the kind's own fields."""
    nu = budget.effective_degrees_of_freedom
    entry = {
        "name": name,
        "sweep": sweep,
        "quantity": quantity,
        "value": budget.estimate,
        "unit": unit,
        "standard_uncertainty": budget.combined_standard_uncertainty,
        "expanded_uncertainty": budget.expanded_uncertainty,
        "coverage_factor": budget.coverage_factor,
        "coverage_probability": budget.coverage_probability,
        "effective_degrees_of_freedom": None if math.isinf(nu) else nu,
        "reported": reported(budget.estimate, budget.combined_standard_uncertainty,
                             budget.expanded_uncertainty, unit),
        "budget": budget.as_dict(),
    }
    clash = set(entry) & set(extra)
    if clash:
        raise ValueError(f"result entry fields given twice: {', '.join(sorted(clash))}")
    entry.update(extra)
    return entry
