"""Exact SI constants (2019 redefinition), taken from scipy.constants and never retyped."""

from scipy import constants as _c

ELEMENTARY_CHARGE: float = _c.e  # C, exact
BOLTZMANN: float = _c.k  # J/K, exact
PLANCK: float = _c.h  # J s, exact
VON_KLITZING: float = _c.h / _c.e**2  # ohm, R_K = h/e^2
JOSEPHSON: float = 2 * _c.e / _c.h  # Hz/V, K_J = 2e/h
