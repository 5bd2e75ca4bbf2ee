"""Physical constants, all SI, taken from :mod:`scipy.constants` (CODATA).

Only derived values are computed here; nothing is typed in by hand, so the
constants follow the CODATA release that scipy ships.
"""
import math

import scipy.constants as _sc

#: Vacuum permittivity epsilon_0, F/m.
EPSILON_0 = float(_sc.epsilon_0)
#: Coulomb constant k = 1 / (4 pi epsilon_0), N m^2 / C^2.
COULOMB_K = 1.0 / (4.0 * math.pi * EPSILON_0)
#: Elementary charge e, C (exact since the 2019 SI).
ELEMENTARY_CHARGE = float(_sc.elementary_charge)
#: Boltzmann constant, J/K (exact since the 2019 SI).
BOLTZMANN = float(_sc.Boltzmann)
#: Standard acceleration of gravity, m/s^2.
STANDARD_GRAVITY = float(_sc.g)
#: Standard atmosphere, Pa.
STANDARD_PRESSURE = float(_sc.atm)
#: 20 degC in kelvin: the reference temperature of the aerosol handbook values.
ROOM_TEMPERATURE = 293.15
#: Avogadro constant, 1/mol.
AVOGADRO = float(_sc.Avogadro)
#: Atomic mass constant, kg.
ATOMIC_MASS = float(_sc.atomic_mass)
