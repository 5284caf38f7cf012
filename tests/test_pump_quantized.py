"""n·e·f with the exact elementary charge."""

import pytest

from analysis.pump.quantized import nominal_current, relative_deviation_ppm


def test_one_gigahertz_gives_exact_current():
    # SI Brochure (9th ed., 2019) 2.2: e = 1.602 176 634e-19 C exactly, so 1 GHz → 160.2176634 pA.
    assert nominal_current(1.0e9) == pytest.approx(160.2176634e-12, rel=1e-15)


def test_545_megahertz():
    # SI Brochure (2019), e exact: 545 MHz × e = 87.318 627 pA (to the digits quoted).
    assert nominal_current(545e6) == pytest.approx(87.318627e-12, abs=5e-19)


def test_two_electrons_per_cycle_doubles_the_current():
    # I = n e f (SI Brochure 2019, e exact).
    assert nominal_current(1.0e9, 2) == pytest.approx(2 * 160.2176634e-12, rel=1e-15)


def test_relative_deviation_in_ppm():
    # Definition (I − n e f)/(n e f); 1 ppm of 160.2176634 pA is 0.1602176634 fA.
    assert relative_deviation_ppm(160.2176634e-12 + 0.1602176634e-15, 1.0e9) == pytest.approx(1.0, rel=1e-6)


@pytest.mark.parametrize(
    "frequency, n, match",
    [(-1e9, 1, "positive"), (0.0, 1, "positive"), (float("nan"), 1, "finite"),
     (1e9, 0, "between"), (1e9, 1.5, "whole"), (1e9, 1000, "between"), ("1e9", 1, "finite")],
)
def test_refuses_impossible_operating_points(frequency, n, match):
    with pytest.raises(ValueError, match=match):
        nominal_current(frequency, n)
