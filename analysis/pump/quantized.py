"""The quantized current I₀ = n·e·f and relative deviations from it.

Since the 2019 revision of the SI the elementary charge is exact (SI Brochure, 9th edition,
section 2.2), so the nominal current of a pump that transfers n electrons per cycle at frequency f
carries no uncertainty beyond that of f itself.
"""

from __future__ import annotations

import math

from analysis.constants import ELEMENTARY_CHARGE

#: Electrons per cycle above which a request is taken to be a mistake rather than a pump setting:
#: published quantized-current sources move one to a few electrons per cycle (common practice,
#: no source); a generous margin keeps parallel-pump arrangements possible.
MAX_ELECTRONS_PER_CYCLE = 100


def nominal_current(frequency_hz: float, electrons_per_cycle: int = 1) -> float:
    """I₀ = n e f in amperes, e exact (SI Brochure 2019, 2.2).

    Raises ``ValueError`` for a non-positive or non-finite frequency and for an n that is not a
    whole number between 1 and :data:`MAX_ELECTRONS_PER_CYCLE`.
    """
    check_operating_point(frequency_hz, electrons_per_cycle)
    return electrons_per_cycle * ELEMENTARY_CHARGE * frequency_hz


def check_operating_point(frequency_hz: float, electrons_per_cycle: int | float) -> None:
    """Refuse a frequency or electron number that cannot describe a pump."""
    if not (isinstance(frequency_hz, int | float) and math.isfinite(frequency_hz)):
        raise ValueError(f"pump frequency must be a finite number in hertz, got {frequency_hz!r}")
    if frequency_hz <= 0:
        raise ValueError(f"pump frequency must be positive, got {frequency_hz} Hz")
    n = electrons_per_cycle
    if isinstance(n, bool) or not isinstance(n, int | float) or not float(n).is_integer():
        raise ValueError(f"electrons per cycle must be a whole number, got {n!r}")
    if not 1 <= n <= MAX_ELECTRONS_PER_CYCLE:
        raise ValueError(
            f"electrons per cycle must lie between 1 and {MAX_ELECTRONS_PER_CYCLE}, got {n!r}"
        )


def relative_deviation_ppm(current_a: float, frequency_hz: float, electrons_per_cycle: int = 1) -> float:
    """(I − n e f)/(n e f) in parts per million."""
    i0 = nominal_current(frequency_hz, electrons_per_cycle)
    return (current_a - i0) / i0 * 1e6
