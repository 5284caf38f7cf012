"""Number formatting shared by every rendering of a certificate (HTML, PDF, DCC).

Values in the record keep full precision; these helpers only decide how many digits a reader
sees. Reported values (GUM 7.2.6 rounding) are already strings in the record's ``reported``.
"""

from __future__ import annotations

from typing import Any


def g(value: Any, digits: int = 6) -> str:
    """A float to ``digits`` significant figures; None (an unbounded ν) as ∞; others as text."""
    if value is None:
        return "∞"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


def g_or_dash(value: Any, digits: int = 6) -> str:
    """Like :func:`g`, but a missing value shows as a dash (a quantity that was not determined)."""
    return "—" if value is None else f"{value:.{digits}g}"


def hertz(frequency: float) -> str:
    """A frequency as people write it: 1 GHz, 545 MHz, 12.5 kHz."""
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if frequency >= scale:
            return f"{frequency / scale:.10g} {unit}"
    return f"{frequency:.10g} Hz"


def manifest_value(value: Any) -> str:
    """A manifest entry as text: whole frequencies in Hz-multiples, other floats to 10 digits."""
    if isinstance(value, float):
        return hertz(value) if value >= 1e3 and value.is_integer() else f"{value:.10g}"
    return str(value)


def percent(probability: float) -> str:
    """A coverage probability as a percentage: 0.95 -> '95 %'."""
    return f"{float(probability) * 100:g} %"
