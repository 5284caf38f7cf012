"""Number formatting shared by every rendering of a certificate (HTML, PDF, DCC).

Values in the record keep full precision; these helpers only decide how many digits a reader
sees. Reported values (GUM 7.2.6 rounding) are already strings in the record's ``reported``.
"""

from __future__ import annotations

from decimal import Decimal
from typing import Any

#: Unit suffixes of record keys (``frequency_Hz``) and how a reader writes them.
_KEY_UNITS = {"Hz": "Hz", "V": "V", "A": "A", "s": "s", "K": "K", "ohm": "Ω", "T": "T",
              "Pa": "Pa", "S": "S", "W": "W", "W_per_K5": "W/K⁵", "m3": "m³"}


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


def label(key: str) -> str:
    """A record key as a reader's label: ``frequency_Hz`` -> "frequency (Hz)",
    ``electrons_per_cycle`` -> "electrons per cycle"."""
    for suffix in sorted(_KEY_UNITS, key=len, reverse=True):
        if key.endswith("_" + suffix) and len(key) > len(suffix) + 1:
            return f"{key[: -len(suffix) - 1].replace('_', ' ')} ({_KEY_UNITS[suffix]})"
    return key.replace("_", " ")


def as_millikelvin(reported: dict[str, str]) -> dict[str, str]:
    """Reported kelvin strings shifted exactly to millikelvin (the same digits, GUM 7.2.6
    rounding kept): {"value": "0.015001", ...} -> {"value": "15.001", ..., "unit": "mK"}."""
    out = {}
    for key in ("value", "standard_uncertainty", "expanded_uncertainty"):
        if key in reported:
            out[key] = format(Decimal(str(reported[key])).scaleb(3), "f")
    out["unit"] = "mK"
    return out
