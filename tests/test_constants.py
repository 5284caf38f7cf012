"""Exact SI constants (SI Brochure, 9th edition, 2019): our single source must agree with them."""

import scipy.constants as sc

from analysis import constants as c


def test_defining_constants_are_exact_si_values():
    # SI Brochure 9th ed. (2019), Table 1: e, k and h are exact by definition.
    assert c.ELEMENTARY_CHARGE == 1.602176634e-19
    assert c.BOLTZMANN == 1.380649e-23
    assert c.PLANCK == 6.62607015e-34
    assert c.ELEMENTARY_CHARGE == sc.e and c.BOLTZMANN == sc.k and c.PLANCK == sc.h


def test_derived_constants():
    # R_K = h/e^2 = 25 812.807 45... ohm and K_J = 2e/h = 483 597.848 4... GHz/V (CODATA 2018,
    # exact consequences of the 2019 SI); k_B/e = 86.173 33 uV/K (same).
    assert abs(c.VON_KLITZING - 25812.8074593) < 1e-6
    assert abs(c.JOSEPHSON / 1e9 - 483597.848417) < 1e-5
    assert abs(c.BOLTZMANN / c.ELEMENTARY_CHARGE * 1e6 - 86.17333) < 1e-5
