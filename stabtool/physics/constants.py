"""Physical constants (CODATA, via :mod:`scipy.constants`) in stabtool's units.

Units used throughout: capacitance in aF, charge in aC, voltage in V, energy
in eV inside the code and meV in reports. With charge in units of e and
capacitance in aF, ``E_AC / C`` is a voltage in V and an energy in eV.
"""

from scipy import constants as _c

#: Elementary charge in attocoulomb (aC).
E_AC: float = _c.e * 1e18
#: Boltzmann constant in eV/K.
KB_EV_PER_K: float = _c.k / _c.e
#: k_B / e in V/K (thermal voltage per kelvin).
KB_OVER_E: float = _c.k / _c.e
