"""Error counting: the probability that a pump cycle transfers the wrong number of electrons.

Single-electron-transistor charge detectors next to the pump's output see each transfer, so errors
can be counted one by one (Fricke et al., PRL 112, 226803 (2014)). Over N cycles with k detected
errors the estimate is p̂ = k/N with the binomial standard uncertainty √(p̂(1 − p̂)/N). Because
errors are rare, the useful statement is often a one-sided upper bound; for rare events (Poisson
limit) it is p < χ²_P(2k + 2)/(2N) at confidence P (Garwood, Biometrika 28, 437 (1936)), which for
k = 0 and P = 0.95 is ln(20)/N ≈ 3/N.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import special


@dataclass(frozen=True)
class ErrorRate:
    """Estimated error probability per cycle and its one-sided upper bound."""

    errors: int
    cycles: int
    probability: float  # p̂ = k/N
    standard_uncertainty: float  # √(p̂(1 − p̂)/N)
    upper_bound: float  # one-sided, at ``confidence``
    confidence: float

    def as_dict(self) -> dict:
        return {
            "errors": self.errors, "cycles": self.cycles, "error_probability": self.probability,
            "standard_uncertainty": self.standard_uncertainty, "upper_bound": self.upper_bound,
            "confidence": self.confidence,
        }


def error_rate(errors: int, cycles: int, confidence: float = 0.95) -> ErrorRate:
    """p̂ = k/N, u(p̂) = √(p̂(1 − p̂)/N) and the upper bound χ²_P(2k + 2)/(2N) (docs/physics.md 4;
    Garwood 1936 for the Poisson upper limit)."""
    if isinstance(errors, bool) or not float(errors).is_integer() or errors < 0:
        raise ValueError(f"the number of errors must be a whole number ≥ 0, got {errors!r}")
    if isinstance(cycles, bool) or not float(cycles).is_integer() or cycles < 1:
        raise ValueError(f"the number of cycles must be a whole number ≥ 1, got {cycles!r}")
    if errors > cycles:
        raise ValueError(f"more errors ({errors}) than cycles ({cycles})")
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence}")
    k, n = int(errors), int(cycles)
    p = k / n
    u = math.sqrt(p * (1 - p) / n)
    chi2_quantile = 2.0 * float(special.gammaincinv(k + 1, confidence))  # χ² quantile, 2k + 2 dof
    upper = min(1.0, chi2_quantile / (2 * n))
    return ErrorRate(k, n, p, u, upper, confidence)
